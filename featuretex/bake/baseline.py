"""The classical bake users do today: a visibility-tested, angle- and footprint-weighted average
of the photos per texel, in linear light. Every learned result is measured against it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from featuretex.bake.config import BaselineConfig
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.loaded import Scene
from featuretex.texels.average import TexelAverage
from featuretex.texels.gutter import fill_texture
from featuretex.texels.sampling import sample_image
from featuretex.texels.visibility import usable_mask, view_samples


@dataclass
class BaselineResult:
    texture_lin: np.ndarray  # (T, T, 3) float32 linear, filled everywhere (gutter included)
    seen: np.ndarray         # (T, T) bool, texels measured by at least one view
    weight: np.ndarray       # (T, T) float32 total sample weight


def bake_baseline(scene: Scene, gbuffers: dict[str, GBuffer], texels: TexelBuffer,
                  cfg: BaselineConfig | None = None) -> BaselineResult:
    """Weighted average of the fitted photos per texel (weight = cos x projected texel area)."""
    cfg = cfg or BaselineConfig()
    T = texels.size
    avg = TexelAverage(T * T)
    for view in scene.manifest.fitted:
        gbuf = gbuffers[view.name]
        s = view_samples(texels, view, gbuf, usable_mask(scene, view, gbuf, cfg.edge_erode_px),
                         cfg.min_cos, cfg.depth_tol_px)
        if len(s.idx) == 0:
            continue
        avg.add(s.idx, sample_image(scene.photo(view), s.xy), s.weight)
    seen = avg.seen.reshape(T, T)
    tex = avg.mean().reshape(T, T, 3).astype(np.float32)
    tex = fill_texture(tex, seen, texels.valid, cfg.gutter)
    return BaselineResult(texture_lin=np.clip(tex, 0, 1), seen=seen, weight=avg.wsum.reshape(T, T).astype(np.float32))
