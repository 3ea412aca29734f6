"""Defaults and bounds shared by the settings of several stages (texture sizes, which views count
for a texel). Light: importing it loads no array code."""

from __future__ import annotations

from featuretex.settings import setting

MIN_TEXTURE = 16     # texels per side: below this a texture holds no usable detail
MAX_TEXTURE = 16384  # texels per side: the largest texture common GPUs load (common practice)
MIN_COS = 0.1        # views seeing a texel more grazing than this are dropped
DEPTH_TOL_PX = 2.0   # visibility: allowed depth gap, in pixel footprints


def texture_size(default: int, zero_means: str | None = None):
    """A texels-per-side setting; with `zero_means`, 0 is allowed too and means that."""
    if zero_means is None:
        return setting(default, ge=MIN_TEXTURE, le=MAX_TEXTURE)
    return setting(default, ge=0, le=MAX_TEXTURE, check=lambda v: v == 0 or v >= MIN_TEXTURE,
                   expect=f"0 ({zero_means}) or {MIN_TEXTURE}..{MAX_TEXTURE}")
