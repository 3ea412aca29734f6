"""The user's own folders for data featuretex keeps between runs (compiled kernels, the demo scene)."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def user_cache_dir() -> Path:
    """$XDG_CACHE_HOME/featuretex, else ~/.cache/featuretex (the XDG base directory default)."""
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "featuretex"


def writable_dir(folder: Path) -> bool:
    """Create `folder` if needed and check that a file can be made in it."""
    try:
        folder.mkdir(parents=True, exist_ok=True)
        with tempfile.NamedTemporaryFile(dir=folder, prefix=".probe-"):
            pass
        return True
    except (OSError, RuntimeError):   # RuntimeError: Path.home() without a home
        return False
