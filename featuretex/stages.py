"""Stage bookkeeping: a stage whose inputs are unchanged and whose artefacts exist is skipped.

`<run dir>/stages.json` records, per stage, the key of its inputs and the seconds it took.
"""

from __future__ import annotations

import hashlib
import json
import time
from dataclasses import asdict, is_dataclass
from pathlib import Path
from typing import Any, Callable, TypeVar

from featuretex.atomic import write_json

R = TypeVar("R")


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
        self.records: dict[str, dict] = json.loads(self.path.read_text()) if self.path.is_file() else {}
        self.timings: dict[str, float] = {}

    def done(self, name: str, key: str, artefacts: list[Path]) -> bool:
        rec = self.records.get(name)
        return bool(rec and rec.get("key") == key and all(p.exists() for p in artefacts))

    def run(self, name: str, key: str, artefacts: list[Path], compute: Callable[[], R],
            load: Callable[[], R]) -> R:
        """Run `compute` (which writes the artefacts) unless done; then or else return `load()`-ed value."""
        if self.done(name, key, artefacts):
            self.timings[name] = float(self.records[name].get("seconds", 0.0))
            return load()
        t0 = time.perf_counter()
        result = compute()
        self.timings[name] = round(time.perf_counter() - t0, 3)
        self.records[name] = {"key": key, "seconds": self.timings[name]}
        write_json(self.path, self.records)
        return result
