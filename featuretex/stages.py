"""Stage bookkeeping: a stage whose inputs are unchanged and whose artefacts exist is skipped.

`<run dir>/stages.json` records, per stage, the key of its inputs and the seconds it took.

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
        self.path = run_dir / "stages.json"
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
        rec = self.records.get(name)
        return bool(rec and rec.get("key") == key and all(p.exists() for p in artefacts))

    def run(self, name: str, key: str, artefacts: list[Path], compute: Callable[[], R],
            load: Callable[[], R]) -> R:
        """Run `compute` (which writes the artefacts) unless done; then or else return `load()`-ed value."""
        if self.done(name, key, artefacts):
            try:
                value = load()
                self.timings[name] = float(self.records[name].get("seconds", 0.0))
                return value
            except DAMAGED as e:
                discard(f"the {name} stage's result", artefacts[0] if artefacts else self.path, e)
        t0 = time.perf_counter()
        result = compute()
        self.timings[name] = round(time.perf_counter() - t0, 3)
        self.records[name] = {"key": key, "seconds": self.timings[name]}
        write_json(self.path, self.records)
        return result
