"""Colours of the error map, and the map painted in UV space with its legend.

Palette reasoning (our own scheme): the classes differ first in LIGHTNESS (CIELAB L* about
100 / 84 / 68 / 44 / 16 for no surface / fine / geometry / texture / uncovered), which every
form of colour blindness and a greyscale print keep; second in hue along the blue-orange axis,
the opposition that protanopes and deuteranopes (the common red-green deficiencies) still see;
tritanopes lose blue-yellow but keep the lightness steps. Uncovered surface is also hatched, so
it reads without colour at all. Fine texels carry a faint tint of sub-threshold evidence.
"""

from __future__ import annotations

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from featuretex.diagnose.classify import FINE, GEOMETRY, OFF, TEXTURE, UNCOVERED

COLOURS: dict[int, tuple[int, int, int]] = {   # sRGB bytes
    OFF: (255, 255, 255),
    FINE: (214, 210, 200),
    GEOMETRY: (232, 146, 48),
    TEXTURE: (47, 104, 178),
    UNCOVERED: (40, 40, 44),
}
HATCH = (150, 150, 156)          # stripes over uncovered texels
LABELS = {
    FINE: "fine",
    GEOMETRY: "geometry / alignment error",
    TEXTURE: "texture under-fit",
    UNCOVERED: "uncovered (too few photos)",
    OFF: "no surface",
}
TINT = 0.4                       # how far sub-threshold evidence tints a fine texel


def paint(cls: np.ndarray, geometry: np.ndarray, texture: np.ndarray, hatch_px: int = 6) -> np.ndarray:
    """(S, S, 3) uint8 sRGB map of classes (S, S) uint8 with fields (S, S) in 0..1 (NaN unknown)."""
    out = np.zeros(cls.shape + (3,), np.float64)
    for c, rgb in COLOURS.items():
        out[cls == c] = rgb
    fine = cls == FINE
    g = np.clip(np.nan_to_num(geometry), 0, 0.5) / 0.5 * TINT
    t = np.clip(np.nan_to_num(texture), 0, 0.5) / 0.5 * TINT
    base = np.array(COLOURS[FINE], np.float64)
    tint = base + g[..., None] * (np.array(COLOURS[GEOMETRY]) - base) \
        + t[..., None] * (np.array(COLOURS[TEXTURE]) - base)
    out[fine] = tint[fine]
    r, c = np.indices(cls.shape)
    stripe = ((r + c) // max(hatch_px // 2, 1)) % 3 == 0
    out[(cls == UNCOVERED) & stripe] = HATCH
    return np.clip(np.rint(out), 0, 255).astype(np.uint8)


def _font(size: int) -> ImageFont.ImageFont:
    try:
        return ImageFont.load_default(size=size)
    except TypeError:               # Pillow without FreeType: the fixed bitmap font
        return ImageFont.load_default()


def with_legend(uv_map: np.ndarray, title: str, lines: list[str]) -> Image.Image:
    """The UV map with a legend strip below it: title, one swatch per class, and `lines` of figures."""
    S = uv_map.shape[1]
    fs = max(12, S // 45)
    font, small = _font(fs), _font(max(10, int(fs * 0.8)))
    row = int(fs * 1.6)
    classes = [FINE, GEOMETRY, TEXTURE, UNCOVERED, OFF]
    per_col = (len(classes) + 1) // 2
    height = int(row * (1.5 + per_col + len(lines)) + fs)
    img = Image.new("RGB", (S, uv_map.shape[0] + height), (255, 255, 255))
    img.paste(Image.fromarray(uv_map, "RGB"), (0, 0))
    d = ImageDraw.Draw(img)
    y0 = uv_map.shape[0] + fs // 2
    d.line([(0, uv_map.shape[0]), (S, uv_map.shape[0])], fill=(0, 0, 0), width=1)
    d.text((fs // 2, y0), title, fill=(0, 0, 0), font=font)
    sw = int(fs * 1.1)
    for k, c in enumerate(classes):
        x = fs // 2 + (k // per_col) * (S // 2)
        y = y0 + int(row * (1.3 + k % per_col))
        patch = paint(np.full((sw, sw), c, np.uint8), np.zeros((sw, sw)), np.zeros((sw, sw)), hatch_px=4)
        img.paste(Image.fromarray(patch, "RGB"), (x, y))
        d.rectangle([x, y, x + sw - 1, y + sw - 1], outline=(0, 0, 0))
        d.text((x + sw + fs // 2, y), LABELS[c], fill=(0, 0, 0), font=font)
    y = y0 + int(row * (1.3 + per_col))
    for line in lines:
        d.text((fs // 2, y), line, fill=(40, 40, 40), font=small)
        y += row
    return img
