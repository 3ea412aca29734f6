"""Texel density: how long a texel is on the surface, and the automatic texture size (one texel per
median photo pixel footprint)."""

from __future__ import annotations

import math

import numpy as np

from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.loaded import Scene
from featuretex.scene.mesh import SceneMesh


def surface_per_uv(mesh: SceneMesh) -> np.ndarray:
    """(F,) float64: 3D area / UV area of each face (scene units^2 per unit of UV area); 0 if degenerate."""
    tri = mesh.vertices[mesh.faces]
    a3 = 0.5 * np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1)
    auv = _uv_areas(mesh)
    return np.where(auv > 1e-20, a3 / np.maximum(auv, 1e-20), 0.0)


def _uv_areas(mesh: SceneMesh) -> np.ndarray:
    """(F,) float64 area of each face in UV space."""
    uvt = mesh.uv[mesh.faces]
    e1, e2 = uvt[:, 1] - uvt[:, 0], uvt[:, 2] - uvt[:, 0]
    return 0.5 * np.abs(e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0])


def texel_edge(mesh: SceneMesh, size: int) -> float:
    """Mean edge of a texel on the surface for a `size` x `size` texture, scene units (NaN without UV area)."""
    auv = _uv_areas(mesh)
    a3, au = float((surface_per_uv(mesh) * auv).sum()), float(auv.sum())
    return math.sqrt(a3 / au) / size if au > 0 else float("nan")


def depth_footprints(depth: np.ndarray, focal_px: float, max_samples: int, rng: np.random.Generator) -> np.ndarray:
    """(N,) float64 scene units per photo pixel (depth / focal length) at up to `max_samples` of the covered
    pixels of a depth buffer `depth` (H, W) float32 (0 = no surface), drawn at random."""
    z = np.asarray(depth)
    z = z[z > 0]
    if len(z) > max_samples:
        z = rng.choice(z, max_samples, replace=False)
    return z.astype(np.float64) / focal_px


def median_pixel_footprint(scene: Scene, gbuffers: dict[str, GBuffer], max_samples: int = 200_000) -> float:
    """Median over fitted views' covered pixels of depth / focal length (scene units per pixel)."""
    rng = np.random.default_rng(0)
    vals = [depth_footprints(gbuffers[v.name].depth, 0.5 * (v.camera.fx + v.camera.fy), max_samples // 8, rng)
            for v in scene.manifest.fitted]
    return float(np.median(np.concatenate(vals))) if vals else float("nan")


def auto_texture_size(mesh: SceneMesh, footprint: float, *, min_size: int = 256, max_size: int = 2048) -> int:
    """Power of two T so a texel on the surface is about `footprint` (scene units per photo pixel)."""
    edge = texel_edge(mesh, 1)
    if not (footprint > 0 and edge > 0):
        return min_size
    t = edge / footprint
    return int(min(max(2 ** round(math.log2(t)), min_size), max_size))
