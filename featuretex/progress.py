"""Progress bars that degrade to periodic log lines off a terminal, and vanish with quiet."""

from __future__ import annotations

import logging
import sys
import time
from typing import Iterable, Iterator, TypeVar

from tqdm import tqdm

T = TypeVar("T")
log = logging.getLogger("featuretex")
LOG_EVERY_S = 30.0  # off a terminal: one log line per this many seconds


def _in_multirun() -> bool:
    """Parallel jobs of a batch would garble bars, and bars never reach the job log."""
    from hydra.core.hydra_config import HydraConfig
    from hydra.types import RunMode

    return HydraConfig.initialized() and HydraConfig.get().mode == RunMode.MULTIRUN


def progress_bar(total: int, desc: str, unit: str = "it", *, quiet: bool = False) -> "Progress":
    return Progress(total, desc, unit, quiet=quiet)


class Progress:
    """tqdm on a terminal (rate and ETA); otherwise a log line every LOG_EVERY_S seconds."""

    def __init__(self, total: int, desc: str, unit: str, *, quiet: bool, initial: int = 0):
        self.total, self.desc, self.unit, self.quiet = total, desc, unit, quiet
        self.n = initial
        self.t0 = time.monotonic()
        self._last_log = self.t0
        self._postfix = ""
        self._bar = None
        if not quiet and sys.stderr.isatty() and not _in_multirun():
            self._bar = tqdm(total=total, desc=desc, unit=unit, initial=initial, dynamic_ncols=True)

    def set_postfix(self, text: str) -> None:
        self._postfix = text
        if self._bar is not None:
            self._bar.set_postfix_str(text, refresh=False)

    def update(self, k: int = 1) -> None:
        self.n += k
        if self._bar is not None:
            self._bar.update(k)
            return
        now = time.monotonic()
        if not self.quiet and (now - self._last_log >= LOG_EVERY_S or self.n >= self.total):
            self._last_log = now
            rate = self.n / max(now - self.t0, 1e-9)
            eta = (self.total - self.n) / rate if rate > 0 else float("inf")
            log.info("%s: %d/%d %s (%.2f %s/s, ETA %.0f s) %s", self.desc, self.n, self.total, self.unit,
                     rate, self.unit, eta, self._postfix)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()


def progress_iter(items: Iterable[T], desc: str, unit: str = "it", *, quiet: bool = False) -> Iterator[T]:
    items = list(items)
    bar = Progress(len(items), desc, unit, quiet=quiet)
    try:
        for it in items:
            yield it
            bar.update()
    finally:
        bar.close()
