"""Stage bookkeeping: a stage whose inputs are unchanged and whose artefacts exist is skipped.

`<run dir>/stages.json` records, per stage, the key of its inputs, the seconds it took and the
files it declares (relative to the run folder). Every stage records through `StageBook.record`:
`run` for a stage that is skipped when done, `run_cached` for a stage with a cache of its own
(working photos, G-buffers, the fit) that always runs and says whether it did new work.

What a run folder holds is a cache of work done: a record or an artefact that does not read back
(damaged disk, a file truncated or replaced by hand) is not an error. It is named in one log line
(`discard`) and computed again.
"""

from __future__ import annotations

import hashlib
import json
import logging
import pickle
import time
import zipfile
from dataclasses import asdict, is_dataclass
from pathlib import Path
from typing import Any, Callable, TypeVar

from featuretex.atomic import write_json
from featuretex.settings import shown

R = TypeVar("R")
log = logging.getLogger("featuretex")
# what reading a damaged cache file raises (numpy, zipfile, json, pickle-free torch loads)
DAMAGED = (OSError, ValueError, EOFError, KeyError, IndexError, TypeError, zipfile.BadZipFile,
           pickle.UnpicklingError)


def discard(what: str, path: Path, err: BaseException | str) -> None:
    """Say in one line that a damaged cache file is thrown away and computed again."""
    why = err if isinstance(err, str) else f"{type(err).__name__}: {err}"
    log.warning("%s: %s does not read back (%s); computing it again", path, what, shown(why, 120).strip("'"))


def key_of(*parts: Any) -> str:
    """Stable short hash of config sections / upstream keys / content hashes."""
    def norm(p: Any) -> Any:
        if is_dataclass(p):
            return asdict(p)
        return p
    text = json.dumps([norm(p) for p in parts], sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


class StageBook:
    def __init__(self, run_dir: Path):
        self.run_dir = Path(run_dir)
        self.path = self.run_dir / "stages.json"
        self.records: dict[str, dict] = self._read() if self.path.is_file() else {}
        self.timings: dict[str, float] = {}

    def _read(self) -> dict[str, dict]:
        try:
            records = json.loads(self.path.read_text(encoding="utf-8"))
            if not (isinstance(records, dict) and all(isinstance(r, dict) for r in records.values())):
                raise ValueError("not a mapping of stage records")
        except DAMAGED as e:
            discard("the record of finished stages", self.path, e)
            return {}
        return records

    def done(self, name: str, key: str, artefacts: list[Path]) -> bool:
        """The stage ran with this key and `artefacts` and the files it recorded all exist."""
        rec = self.records.get(name)
        if not (rec and rec.get("key") == key):
            return False
        recorded = [self.run_dir / p for p in rec.get("artefacts", [])]
        return all(p.exists() for p in [*artefacts, *recorded])

    def record(self, name: str, key: str, artefacts: list[Path], seconds: float) -> None:
        """A stage finished: its key, seconds and declared files go to stages.json at once."""
        self.timings[name] = round(float(seconds), 3)
        self.records[name] = {"key": key, "seconds": self.timings[name],
                              "artefacts": [self._relative(p) for p in artefacts]}
        write_json(self.path, self.records)

    def _relative(self, path: Path) -> str:
        path = Path(path)
        return str(path.relative_to(self.run_dir)) if path.is_relative_to(self.run_dir) else str(path)

    def run(self, name: str, key: str, artefacts: list[Path], compute: Callable[[], R],
            load: Callable[[], R], *, produced: Callable[[R], list[Path]] | None = None) -> R:
        """Run `compute` (which writes the artefacts) unless done; then or else return `load()`-ed value.
        `produced(result)` names further files only known once computed (recorded, then checked too)."""
        if self.done(name, key, artefacts):
            try:
                value = load()
                self.timings[name] = float(self.records[name].get("seconds", 0.0))
                return value
            except DAMAGED as e:
                discard(f"the {name} stage's result", artefacts[0] if artefacts else self.path, e)
        t0 = time.perf_counter()
        result = compute()
        extra = produced(result) if produced is not None else []
        self.record(name, key, [*artefacts, *extra], time.perf_counter() - t0)
        return result

    def run_cached(self, name: str, key: str, compute: Callable[[], tuple[R, bool]],
                   artefacts: Callable[[R], list[Path]], *, seconds: Callable[[R], float] | None = None) -> R:
        """A stage whose own cache decides what to redo: `compute` always runs and returns (value,
        whether it did new work). Without new work on a recorded, unchanged key the recorded seconds
        stand; else the stage is recorded with `artefacts(value)` and `seconds(value)` (default: the
        wall time of `compute`)."""
        t0 = time.perf_counter()
        value, fresh = compute()
        rec = self.records.get(name)
        if not fresh and rec is not None and rec.get("key") == key:
            self.timings[name] = float(rec.get("seconds", 0.0))
        else:
            self.record(name, key, artefacts(value), seconds(value) if seconds else time.perf_counter() - t0)
        return value
