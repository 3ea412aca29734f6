"""Settings of the working photos (`photos.*`): the resolution and crop each photo is worked at
(featuretex/working.py), with what each allows (checked by featuretex/settings.py)."""

from __future__ import annotations

from dataclasses import dataclass

from featuretex.settings import setting

MIN_SIDE = 64   # smallest photos.max_side, pixels: below it a working image shows no usable detail


@dataclass
class PhotoConfig:
    # working size / photo size; 0 = automatic (about two working pixels per texel edge of the texture in use)
    scale: float = setting(0.0, ge=0, le=1, check=lambda v: v == 0 or v > 0, expect="0 (automatic) or (0, 1]")
    # cap on the longest side of a working image, pixels; 0 = none
    max_side: int = setting(0, ge=0, check=lambda v: v == 0 or v >= MIN_SIDE, expect=f"0 (no cap) or >= {MIN_SIDE}")
    crop: bool = True   # work on the object's box (plus a margin) instead of the whole photo
