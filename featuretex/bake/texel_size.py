"""Automatic texture size from texel density: one texel per median photo pixel footprint."""

from __future__ import annotations

import math

import numpy as np

from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.loaded import Scene


def median_pixel_footprint(scene: Scene, gbuffers: dict[str, GBuffer], max_samples: int = 200_000) -> float:
    """Median over fitted views' covered pixels of depth / focal length (scene units per pixel)."""
    rng = np.random.default_rng(0)
    vals = []
    for v in scene.manifest.fitted:
        d = np.asarray(gbuffers[v.name].depth)
        z = d[d > 0]
        if len(z) > max_samples // 8:
            z = rng.choice(z, max_samples // 8, replace=False)
        vals.append(z / (0.5 * (v.camera.fx + v.camera.fy)))
    return float(np.median(np.concatenate(vals))) if vals else float("nan")


def auto_texture_size(scene: Scene, gbuffers: dict[str, GBuffer], *, min_size: int = 256,
                      max_size: int = 2048) -> int:
    """Power of two T so a texel on the surface is about the median pixel footprint."""
    m = scene.mesh
    tri = m.vertices[m.faces]
    area3d = 0.5 * np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1).sum()
    uvt = m.uv[m.faces]
    e1, e2 = uvt[:, 1] - uvt[:, 0], uvt[:, 2] - uvt[:, 0]
    area_uv = 0.5 * np.abs(e1[:, 0] * e2[:, 1] - e1[:, 1] * e2[:, 0]).sum()
    s = median_pixel_footprint(scene, gbuffers)
    if not (s > 0 and area_uv > 0):
        return min_size
    t = math.sqrt(area3d / (s * s * area_uv))
    return int(min(max(2 ** round(math.log2(t)), min_size), max_size))
