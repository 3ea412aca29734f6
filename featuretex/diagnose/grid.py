"""The diagnosis's own UV grid (about one photo pixel per texel, capped for speed), texel surface
areas, and resampling of its fields to the texture's resolution."""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import ndimage

from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.loaded import Scene
from featuretex.scene.mesh import SceneMesh
from featuretex.texels.size import median_pixel_footprint, surface_per_uv, texel_edge


def texel_areas(mesh: SceneMesh, texels: TexelBuffer) -> np.ndarray:
    """(T, T) float64 surface area each texel stands for, scene units^2 (0 off the surface)."""
    ratio = surface_per_uv(mesh)
    out = np.zeros(texels.tri.shape, np.float64)
    v = texels.valid
    out[v] = ratio[texels.tri[v]] / texels.size ** 2
    return out


def footprint_ratio(scene: Scene, gbuffers: dict[str, GBuffer], size: int) -> float:
    """Texel edge of a `size` texture over the median photo pixel footprint (> 1: texture coarser)."""
    return texel_edge(scene.mesh, size) / median_pixel_footprint(scene, gbuffers)


def working_size(texture_size: int, ratio: float, lo: int, hi: int) -> int:
    """Power of two near one photo pixel per texel (texture_size * ratio), within [lo, hi]."""
    want = texture_size * ratio if ratio > 0 and math.isfinite(ratio) else texture_size
    return int(min(max(2 ** round(math.log2(max(want, 1.0))), lo), hi))


class Resampler:
    """Resamples (D, D[, C]) fields known on `valid_src` to the (T, T) grid of `valid_dst`.

    Both grids cover the same UV square. T divides D: masked mean ('mean') or max ('max') over
    each block of D/T texels; otherwise each texel takes the source cell holding its centre.
    Destination surface texels whose source cells are all off the surface (island rims) copy the
    nearest one that is on it (distance transform, computed once); unknown values stay NaN.
    """

    def __init__(self, valid_src: np.ndarray, valid_dst: np.ndarray):
        self.src, self.dst = valid_src, valid_dst
        D, T = valid_src.shape[0], valid_dst.shape[0]
        self.block = T < D and D % T == 0
        if self.block:
            k = D // T
            have = valid_src.reshape(T, k, T, k).any(axis=(1, 3))
        else:
            self.cell = ((np.arange(T) + 0.5) * D / T).astype(np.int64)   # source cell of each centre
            have = valid_src[self.cell][:, self.cell]
        self.need = valid_dst & ~have
        self.nearest = None
        if self.need.any() and have.any():
            _, (ri, ci) = ndimage.distance_transform_edt(~have, return_indices=True)
            self.nearest = (ri[self.need], ci[self.need])

    def __call__(self, field: np.ndarray, mode: str = "mean") -> np.ndarray:
        T = self.dst.shape[0]
        f = np.where(_bcast(self.src, field) & np.isfinite(field), field, np.nan).astype(np.float32)
        if self.block:
            k = f.shape[0] // T
            blocks = f.reshape(T, k, T, k, *f.shape[2:])
            with warnings.catch_warnings():          # blocks without a value give NaN, silently
                warnings.simplefilter("ignore", RuntimeWarning)
                out = np.nanmax(blocks, axis=(1, 3)) if mode == "max" else np.nanmean(blocks, axis=(1, 3))
        else:
            out = f[self.cell][:, self.cell]
        if self.nearest is not None:
            out[self.need] = out[self.nearest]
        out[~self.dst] = np.nan
        return out.astype(np.float32)


def resample_to(field: np.ndarray, valid_src: np.ndarray, valid_dst: np.ndarray, *,
                mode: str = "mean") -> np.ndarray:
    """One-off Resampler(valid_src, valid_dst)(field, mode)."""
    return Resampler(valid_src, valid_dst)(field, mode)


def _bcast(mask: np.ndarray, like: np.ndarray) -> np.ndarray:
    return mask.reshape(mask.shape + (1,) * (like.ndim - mask.ndim))

