"""Render a texture on the mesh at a view through its G-buffer (what a viewer shows, unlit)."""

from __future__ import annotations

import numpy as np

from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.mesh import SceneMesh
from featuretex.texels.sampling import sample_texture


def render_texture(gbuf: GBuffer, mesh: SceneMesh, texture: np.ndarray) -> np.ndarray:
    """(H, W, C) float32: `texture` (T, T, C) sampled bilinearly at the G-buffer UVs; 0 off the mesh."""
    cov = np.asarray(gbuf.coverage)
    out = np.zeros(gbuf.shape + (texture.shape[2],), np.float32)
    uv = gbuf.uv(mesh)
    out[cov] = sample_texture(texture, uv[cov])
    return out
