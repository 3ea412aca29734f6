"""Finding the bundled demo scene: the committed copy in the source tree, else one generated once into
the user cache folder."""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
from pathlib import Path

from featuretex.demo.assembly import build_demo
from featuretex.userdirs import user_cache_dir

DEMO_VERSION = "jug-1"   # bump when the generated content changes (names the cache folder)


def repo_demo_dir() -> Path:
    """demo_assets/ of the source tree this module sits in (may not exist for an installed package)."""
    return Path(__file__).resolve().parents[2] / "demo_assets"


def ensure_demo_scene() -> Path:
    """Path of the demo's scene.yaml: the committed one when running from the repo, else one
    generated once into the user cache folder (XDG_CACHE_HOME or ~/.cache)/featuretex/."""
    committed = repo_demo_dir() / "scene" / "scene.yaml"
    if committed.is_file():
        return committed
    cache = user_cache_dir() / f"demo-{DEMO_VERSION}"
    manifest = cache / "scene" / "scene.yaml"
    if manifest.is_file():
        return manifest
    cache.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{cache.name}.", dir=cache.parent))
    try:
        build_demo(tmp, log=lambda msg: print(f"featuretex demo: {msg}", file=sys.stderr))
        try:
            os.replace(tmp, cache)   # atomic; if another process won the race, keep its copy
        except OSError:
            if not manifest.is_file():
                raise
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
    return manifest
