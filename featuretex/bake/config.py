"""Settings of the baked texture (`texture.*`), the classical bake (`baseline.*`) and the bake of the
fitted model (`bake.*`), each with what it allows (checked by featuretex/settings.py)."""

from __future__ import annotations

from dataclasses import dataclass

from featuretex.settings import setting
from featuretex.texels.config import DEPTH_TOL_PX, MIN_COS, texture_size

ROBUST_MODES = ("cauchy", "median", "mean")


@dataclass
class TextureConfig:
    size: int = texture_size(0, "automatic")  # output texture size in texels; 0 = automatic from texel density
    min_size: int = texture_size(256)      # bounds of the automatic size
    max_size: int = texture_size(2048)
    gutter: int = setting(8, ge=0, le=256)  # gutter padding in texels (common practice: >= 4 for mipmaps)
    bits: int = setting(8, choices=(8, 16))  # PNG bit depth of texture.png

    def relations(self):
        if self.min_size > self.max_size:
            yield "min_size", f"must not exceed texture.max_size ({self.max_size})"


@dataclass
class BaselineConfig:
    min_cos: float = setting(MIN_COS, ge=0, lt=1)   # views seeing a texel more grazing than this are dropped
    depth_tol_px: float = setting(DEPTH_TOL_PX, gt=0)    # visibility: allowed depth gap, in pixel footprints
    edge_erode_px: int = setting(2, ge=0, le=256)  # drop samples this close to a silhouette (background bleed)
    gutter: int = setting(8, ge=0, le=256)      # texels of gutter padding (common practice: >= 4 for mipmaps)


@dataclass
class BakeConfig:
    residual: bool = True                       # add the screen-space decoder's reprojected residual
    robust: str = setting("cauchy", choices=ROBUST_MODES)  # per-texel combination: cauchy (median + IRLS), median, mean
    iterations: int = setting(3, ge=0, le=100)  # Cauchy reweighting passes after the median
    scale_min: float = setting(0.005, gt=0)     # floor of the Cauchy scale, linear light (about 1/255 in sRGB mid-tones)
    min_cos: float = setting(MIN_COS, ge=0, lt=1)   # views seeing a texel more grazing than this are dropped
    depth_tol_px: float = setting(DEPTH_TOL_PX, gt=0)    # visibility: allowed depth gap, in pixel footprints
    edge_erode_px: int = setting(2, ge=0, le=256)  # drop samples this close to a silhouette (decoder padding, background)
    gutter: int = setting(8, ge=0, le=256)      # texels of gutter padding; the pipeline sets it from texture.gutter
