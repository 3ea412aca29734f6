"""Settings of the baked texture (`texture.*`), the classical bake (`baseline.*`) and the bake of the
fitted model (`bake.*`), each with what it allows (checked by featuretex/settings.py)."""

from __future__ import annotations

from dataclasses import dataclass

from featuretex.settings import setting

MIN_TEXTURE = 16     # texels per side: below this a texture holds no usable detail
MAX_TEXTURE = 16384  # texels per side: the largest texture common GPUs load (common practice)
ROBUST_MODES = ("cauchy", "median", "mean")


def texture_size(default: int, zero_means: str | None = None):
    """A texels-per-side setting; with `zero_means`, 0 is allowed too and means that."""
    if zero_means is None:
        return setting(default, ge=MIN_TEXTURE, le=MAX_TEXTURE)
    return setting(default, ge=0, le=MAX_TEXTURE, check=lambda v: v == 0 or v >= MIN_TEXTURE,
                   expect=f"0 ({zero_means}) or {MIN_TEXTURE}..{MAX_TEXTURE}")


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
    min_cos: float = setting(0.1, ge=0, lt=1)   # views seeing a texel more grazing than this are dropped
    depth_tol_px: float = setting(2.0, gt=0)    # visibility: allowed depth gap, in pixel footprints
    edge_erode_px: int = setting(2, ge=0, le=256)  # drop samples this close to a silhouette (background bleed)
    gutter: int = setting(8, ge=0, le=256)      # texels of gutter padding (common practice: >= 4 for mipmaps)


@dataclass
class BakeConfig:
    residual: bool = True                       # add the screen-space decoder's reprojected residual
    robust: str = setting("cauchy", choices=ROBUST_MODES)  # per-texel combination: cauchy (median + IRLS), median, mean
    iterations: int = setting(3, ge=0, le=100)  # Cauchy reweighting passes after the median
    scale_min: float = setting(0.005, gt=0)     # floor of the Cauchy scale, linear light (about 1/255 in sRGB mid-tones)
    min_cos: float = setting(0.1, ge=0, lt=1)   # views seeing a texel more grazing than this are dropped
    depth_tol_px: float = setting(2.0, gt=0)    # visibility: allowed depth gap, in pixel footprints
    edge_erode_px: int = setting(2, ge=0, le=256)  # drop samples this close to a silhouette (decoder padding, background)
    gutter: int = setting(8, ge=0, le=256)      # texels of gutter padding; the pipeline sets it from texture.gutter
