"""G-buffer stage: one buffer per view, rendered once and then read from the on-disk cache."""

from __future__ import annotations

from pathlib import Path

from featuretex import plugins
from featuretex.progress import progress_iter
from featuretex.raster.cache import cache_path, load_or_render
from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.loaded import Scene


def build_gbuffers(scene: Scene, cache_dir: Path, backend: str = "embree", *, quiet: bool = False
                   ) -> tuple[dict[str, GBuffer], int]:
    """Return ({view name: G-buffer}, number rendered now). Cached views are memory-mapped."""
    rasteriser = None
    out: dict[str, GBuffer] = {}
    rendered = 0
    for view in progress_iter(scene.views, desc="G-buffers", unit="view", quiet=quiet):
        if rasteriser is None:
            rasteriser = _LazyBackend(backend, scene)
        gb, cached = load_or_render(cache_dir, rasteriser, scene.mesh, view)
        rendered += not cached
        out[view.name] = gb
    return out, rendered


def gbuffer_files(scene: Scene, cache_dir: Path, backend: str = "embree") -> list[Path]:
    """The cache files `build_gbuffers` reads or writes, one per view."""
    return [cache_path(cache_dir, backend, scene.mesh, view) for view in scene.views]


class _LazyBackend:
    """Builds the backend's acceleration structure only when a view misses the cache."""

    def __init__(self, name: str, scene: Scene):
        self.name = name
        self._scene = scene
        self._impl = None

    def render(self, view):
        if self._impl is None:
            self._impl = plugins.load("rasterisers", self.name)(self._scene.mesh)
        return self._impl.render(view)
