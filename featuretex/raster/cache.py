"""On-disk G-buffer cache keyed by mesh + camera content; entries are memory-mapped on load."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np

from featuretex.atomic import atomic_path
from featuretex.raster.gbuffer import GBUFFER_DTYPE, GBuffer
from featuretex.scene.manifest import View
from featuretex.scene.mesh import SceneMesh
from featuretex.stages import DAMAGED, discard

CACHE_VERSION = "gbuffer-v1"


def cache_key(backend: str, mesh: SceneMesh, view: View) -> str:
    h = hashlib.sha256()
    for part in (CACHE_VERSION, backend, mesh.content_key(), view.camera.content_key()):
        h.update(part.encode())
    h.update(np.ascontiguousarray(view.world_to_camera, dtype=np.float64).tobytes())
    return h.hexdigest()[:24]


def _read(path: Path) -> np.ndarray | None:
    """The cached (H, W) buffer as a read-only memory map; None (said in one line) if it is damaged."""
    try:
        arr = np.load(path, mmap_mode="r")   # refuses a file shorter than its header says
        if arr.dtype != GBUFFER_DTYPE or arr.ndim != 2:
            raise ValueError(f"holds {arr.dtype} {arr.shape}, not a G-buffer")
        return arr
    except DAMAGED as e:
        discard("a cached G-buffer", path, e)
        return None


def cache_path(cache_dir: Path, backend: str, mesh: SceneMesh, view: View) -> Path:
    """The cache file of one view's G-buffer."""
    return Path(cache_dir) / f"{cache_key(backend, mesh, view)}.npy"


def load_or_render(cache_dir: Path, backend, mesh: SceneMesh, view: View) -> tuple[GBuffer, bool]:
    """Return (G-buffer, was_cached). The buffer is a read-only memory map of the cache file."""
    path = cache_path(cache_dir, backend.name, mesh, view)
    arr = _read(path) if path.is_file() else None
    if arr is not None:
        return GBuffer(view=view.name, data=arr), True
    data = backend.render(view)
    assert data.dtype == GBUFFER_DTYPE
    with atomic_path(path) as tmp:
        np.save(tmp, data)
    return GBuffer(view=view.name, data=np.load(path, mmap_mode="r")), False
