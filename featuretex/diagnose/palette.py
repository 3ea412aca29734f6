"""Colours of the error map, its legend, and the map painted in UV space with that legend.

Palette reasoning (our own scheme): the classes differ first in LIGHTNESS (CIELAB L* about
100 / 84 / 68 / 44 / 31 / 16 for no surface / fine / geometry / texture / cavity / uncovered),
which every form of colour blindness and a greyscale print keep; second in hue along the
blue-orange axis, the opposition that protanopes and deuteranopes (the common red-green
deficiencies) still see; tritanopes lose blue-yellow but keep the lightness steps. Uncovered
surface and cavities are also hatched, in opposite directions, so they read without colour at
all. Fine texels carry a faint tint of sub-threshold evidence.

`LEGEND` and `NOTE` are the one legend every picture of the map carries (error_map.png, the
report's stills, the report page itself); `swatch` gives each entry's exact pixels.
"""

from __future__ import annotations

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from featuretex.diagnose.classify import CAVITY, FINE, GEOMETRY, OFF, TEXTURE, UNCOVERED

COLOURS: dict[int, tuple[int, int, int]] = {   # sRGB bytes
    OFF: (255, 255, 255),
    FINE: (214, 210, 200),
    GEOMETRY: (232, 146, 48),
    TEXTURE: (47, 104, 178),
    UNCOVERED: (40, 40, 44),
    CAVITY: (84, 66, 98),
}
# hatched classes: stripe colour and direction (+1: "/" stripes, -1: "\\" stripes)
HATCH: dict[int, tuple[tuple[int, int, int], int]] = {UNCOVERED: ((150, 150, 156), 1),
                                                       CAVITY: ((146, 128, 160), -1)}
# (class, label, what it asks of the reader), in legend order
LEGEND: tuple[tuple[int, str, str], ...] = (
    (GEOMETRY, "geometry / alignment error", "photos disagree with the mesh: fix the shape or the camera poses"),
    (TEXTURE, "texture under-fit", "the shape holds: a longer fit or a larger texture sharpens it"),
    (UNCOVERED, "uncovered (too few photos)", "too few usable photos saw it: rescan it if it matters"),
    (CAVITY, "cavity (no camera reaches)", "inside a hollow no outside camera sees: not a rescan reason"),
    (FINE, "fine", "photos and model agree; a pale tint marks evidence below the limits"),
    (OFF, "no surface", "texture space the mesh does not use (UV map only)"),
)
LABELS = {c: label for c, label, _ in LEGEND}
MEANING = {c: meaning for c, _, meaning in LEGEND}
NOTE = "Hatching: uncovered surface has / stripes and cavities \\ stripes, so both read without colour."
TINT = 0.4                       # how far sub-threshold evidence tints a fine texel
SWATCH_PX = 20                   # legend swatch edge, pixels (the page shows the same pixels)


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
    for code, (rgb, direction) in HATCH.items():
        stripe = ((c + direction * r) // max(hatch_px // 2, 1)) % 3 == 0
        out[(cls == code) & stripe] = rgb
    return np.clip(np.rint(out), 0, 255).astype(np.uint8)


def swatch(code: int, px: int = SWATCH_PX) -> np.ndarray:
    """(px, px, 3) uint8: the legend swatch of a class, with a 1-pixel dark frame."""
    patch = paint(np.full((px, px), code, np.uint8), np.zeros((px, px)), np.zeros((px, px)), hatch_px=4)
    patch[[0, -1], :] = patch[:, [0, -1]] = (40, 40, 40)
    return patch


def _font(size: int) -> ImageFont.ImageFont:
    try:
        return ImageFont.load_default(size=size)
    except TypeError:               # Pillow without FreeType: the fixed bitmap font
        return ImageFont.load_default()


def legend_strip(width: int, title: str, lines: list[str], font_px: int = 13) -> Image.Image:
    """A white strip `width` pixels wide: title, one swatch + label + meaning per LEGEND entry
    (two columns when wide enough), NOTE, then `lines` of figures."""
    font, small = _font(font_px), _font(max(10, font_px - 2))
    pad, row = font_px, int(font_px * 2.6)
    cols = 2 if width >= 900 else 1
    per_col = -(-len(LEGEND) // cols)
    extra = [NOTE, *lines]
    height = pad + int(font_px * 1.8) + per_col * row + len(extra) * int(font_px * 1.5) + pad
    img = Image.new("RGB", (width, height), (255, 255, 255))
    d = ImageDraw.Draw(img)
    d.line([(0, 0), (width, 0)], fill=(0, 0, 0), width=1)
    d.text((pad, pad), title, fill=(0, 0, 0), font=font)
    y0 = pad + int(font_px * 1.8)
    for k, (code, label, meaning) in enumerate(LEGEND):
        x = pad + (k // per_col) * (width // cols)
        y = y0 + (k % per_col) * row
        img.paste(Image.fromarray(swatch(code), "RGB"), (x, y))
        d.text((x + SWATCH_PX + 8, y), label, fill=(0, 0, 0), font=font)
        d.text((x + SWATCH_PX + 8, y + int(font_px * 1.15)), meaning, fill=(70, 70, 70), font=small)
    y = y0 + per_col * row
    for line in extra:
        d.text((pad, y), line, fill=(40, 40, 40), font=small)
        y += int(font_px * 1.5)
    return img


def with_legend(picture: np.ndarray, title: str, lines: list[str]) -> Image.Image:
    """The picture (H, W, 3) uint8 with the legend strip below it."""
    H, W = picture.shape[:2]
    strip = legend_strip(W, title, lines, font_px=max(12, min(16, W // 60)))
    img = Image.new("RGB", (W, H + strip.height), (255, 255, 255))
    img.paste(Image.fromarray(picture, "RGB"), (0, 0))
    img.paste(strip, (0, H))
    return img
