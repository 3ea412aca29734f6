"""Stopping a fit cleanly: Ctrl-C / SIGTERM only raise a flag, so the step in flight finishes and
the checkpoint written after it is a consistent state."""

from __future__ import annotations

import logging
import signal
import threading
from typing import Any

log = logging.getLogger("featuretex")


class StopRequest:
    """Ctrl-C / SIGTERM set a flag (a second Ctrl-C interrupts at once); handlers restored on exit."""

    def __init__(self) -> None:
        self.signum: int | None = None
        self._old: dict[int, Any] = {}

    def _handler(self, signum: int, frame: Any) -> None:
        if self.signum == signal.SIGINT and signum == signal.SIGINT:
            raise KeyboardInterrupt
        self.signum = signum
        log.warning("fit: stop requested; checkpointing after this step (Ctrl-C again to abort at once)")

    def __enter__(self) -> "StopRequest":
        if threading.current_thread() is threading.main_thread():
            for s in (signal.SIGINT, signal.SIGTERM):
                self._old[s] = signal.signal(s, self._handler)
        return self

    def __exit__(self, *exc: Any) -> None:
        for s, h in self._old.items():
            signal.signal(s, h)
