"""Atomic file writes: write to a temporary file in the same folder, then rename over the target."""

from __future__ import annotations

import json
import os
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Iterator

# marks a temporary file of `atomic_path`; a SIGKILL between write and rename leaves one behind,
# hidden (dot name) and removed by `remove_partials` when the run starts again
PARTIAL_TAG = ".partial-"


@contextmanager
def atomic_path(target: str | Path, suffix: str | None = None) -> Iterator[Path]:
    """Yield a temporary path beside `target`; on success it is renamed onto `target`.

    The temporary name keeps the target's extension (writers pick formats by extension).
    A failure or a kill leaves the old target (or nothing) in place, never half a file.
    """
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}{PARTIAL_TAG}", suffix=suffix or "".join(target.suffixes),
                               dir=target.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    os.chmod(tmp_path, 0o666 & ~_umask())  # mkstemp makes 0600; outputs get the usual permissions
    try:
        yield tmp_path
        with open(tmp_path, "rb+") as f:
            os.fsync(f.fileno())
        os.replace(tmp_path, target)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_bytes(target: str | Path, data: bytes) -> None:
    with atomic_path(target) as tmp:
        tmp.write_bytes(data)


def write_text(target: str | Path, text: str) -> None:
    write_bytes(target, text.encode("utf-8"))


def write_json(target: str | Path, obj: Any) -> None:
    write_text(target, json.dumps(obj, indent=2, sort_keys=False, allow_nan=False) + "\n")


def remove_partials(folder: str | Path) -> list[Path]:
    """Delete the temporary files that killed writers left anywhere under `folder`; return them."""
    found = [p for p in Path(folder).rglob(f".*{PARTIAL_TAG}*") if p.is_file()]
    for p in found:
        p.unlink(missing_ok=True)
    return found
