"""The report's picture of the diagnosis, read from what the diagnose stage wrote: the classes,
fields and numbered regions of error_map.npz (`cls`, `geometry`, `texture`, `region`) painted with
the diagnosis's own palette, and the regions as summary.json lists them (`regions`: class, share,
area, centre, marker, offset, payoff). Nothing here classifies or measures again: the numbers on
the report's pictures are the numbers in the reasons and in error_map.png.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from PIL import Image, ImageDraw, ImageFont
from scipy import ndimage

from featuretex.diagnose.classify import GEOMETRY, OFF, TEXTURE, UNCOVERED, from_severity, severity
from featuretex.diagnose.numbered import label_texel
from featuretex.diagnose.palette import paint
from featuretex.texels.gutter import fill_texture

KINDS = {GEOMETRY: "geometry", TEXTURE: "texture", UNCOVERED: "uncovered"}   # summary.json class names
MARK, INK = (255, 230, 60), (16, 16, 16)     # region outlines and number badges


@dataclass(frozen=True)
class Region:
    """One numbered region: summary.json's entry, and where it lies on the report's texel grid."""

    number: int               # as in the reasons, error_map.png and summary.json
    kind: str                 # "geometry" | "texture" | "uncovered"
    share: float              # fraction of the surface area, 0..1
    area: float | None        # scene units^2
    centre: tuple[float, float, float] | None   # area-weighted mean position, scene units
    marker: tuple[float, float, float] | None   # a surface point inside the region, scene units
    offset: float             # median displacement along the normal inside, scene units (NaN: none)
    payoff: dict[str, float]  # estimated held-out PSNR gain in dB: {"geometry", "texture"} (may be empty)
    box: tuple[int, int, int, int]   # (row0, col0, row1, col1) on the report's grid, exclusive ends
    uv: tuple[float, float]   # (u, v) of the box centre, v up
    mask: np.ndarray = field(repr=False, compare=False, default=None)   # (r1-r0, c1-c0) bool inside the box


@dataclass
class ErrorFields:
    """error_map.npz on the report's T x T grid (row 0 = top of the texture image)."""

    cls: np.ndarray           # (T, T) uint8 class (featuretex.diagnose.classify)
    geometry: np.ndarray      # (T, T) float32 0..1, NaN unknown
    texture: np.ndarray       # (T, T) float32 0..1, NaN unknown
    region: np.ndarray        # (T, T) int32 region number per texel, 0 in none


def reduction(size: int, most: int = 512) -> int:
    """Block edge k (a divisor of size) that brings a size x size map to at most `most` per side
    (1 when size already fits or has no such divisor): the report needs no more to be read."""
    k = 1
    while size // k > most and size % (2 * k) == 0:
        k *= 2
    return k


def _block_mean(a: np.ndarray, k: int) -> np.ndarray:
    """(T, T) -> (T/k, T/k) mean of the finite values of each k x k block (NaN where none)."""
    if k == 1:
        return a
    b = a.reshape(a.shape[0] // k, k, a.shape[1] // k, k)
    ok = np.isfinite(b)
    n = ok.sum(axis=(1, 3))
    tot = np.where(ok, b, 0.0).sum(axis=(1, 3))
    return np.where(n > 0, tot / np.maximum(n, 1), np.nan).astype(np.float32)


def _block_worst(cls: np.ndarray, k: int) -> np.ndarray:
    """(T, T) classes -> (T/k, T/k): the most severe class of each block (as the diagnosis pools them)."""
    if k == 1:
        return cls
    return from_severity(severity(cls).reshape(cls.shape[0] // k, k, cls.shape[1] // k, k).max(axis=(1, 3)))


def _block_max(a: np.ndarray, k: int) -> np.ndarray:
    return a if k == 1 else a.reshape(a.shape[0] // k, k, a.shape[1] // k, k).max(axis=(1, 3))


def load_fields(npz, most: int = 512) -> ErrorFields:
    """Read error_map.npz, pooled over k x k texel blocks (k = reduction(size, most); classes: the
    most severe; regions: the highest number, so a small region keeps its texels)."""
    with np.load(npz) as z:
        k = reduction(int(np.asarray(z["geometry"]).shape[0]), most) if "geometry" in z.files else 1
        missing = [f for f in ("cls", "geometry", "texture", "region") if f not in z.files]
        if missing:
            raise KeyError(f"error_map.npz lacks {', '.join(missing)} (written by an older featuretex: run the "
                           "diagnose stage again)")
        return ErrorFields(_block_worst(np.asarray(z["cls"], np.uint8), k),
                           _block_mean(np.asarray(z["geometry"], np.float32), k),
                           _block_mean(np.asarray(z["texture"], np.float32), k),
                           _block_max(np.nan_to_num(np.asarray(z["region"], np.float32)).astype(np.int32), k))


def _point(v) -> tuple[float, float, float] | None:
    try:
        p = tuple(float(c) for c in v)
    except (TypeError, ValueError):
        return None
    return p if len(p) == 3 and all(np.isfinite(p)) else None  # type: ignore[return-value]


def regions_of(entries: list, ids: np.ndarray) -> list[Region]:
    """summary.json `regions` (in their order) with their place on the grid `ids`; an entry whose
    texels the grid does not hold keeps an empty box."""
    T = ids.shape[0]
    out = []
    for e in entries:
        if not isinstance(e, dict) or e.get("class") not in KINDS.values():
            continue
        n = int(e.get("number", 0))
        m = ids == n
        if m.any():
            rows, cols = np.nonzero(m)
            box = (int(rows.min()), int(cols.min()), int(rows.max()) + 1, int(cols.max()) + 1)
        else:
            box = (0, 0, 0, 0)
        off = e.get("offset")
        pay = e.get("payoff_db") if isinstance(e.get("payoff_db"), dict) else {}
        out.append(Region(n, e["class"], float(e.get("share", 0.0)), float(e["area"]) if e.get("area") is not None else None,
                   _point(e.get("centre")), _point(e.get("marker")),
                   float(off) if off is not None else float("nan"),
                   {k: float(v) for k, v in pay.items() if isinstance(v, (int, float))},
                   box, ((box[1] + box[3]) / 2 / T, 1.0 - (box[0] + box[2]) / 2 / T), m[box[0]:box[2], box[1]:box[3]]))
    return out


def painted(f: ErrorFields) -> np.ndarray:
    """(T, T, 3) uint8 sRGB map in the diagnosis's palette."""
    return paint(f.cls, f.geometry, f.texture)


def _font(size: int) -> ImageFont.ImageFont:
    try:
        return ImageFont.load_default(size=size)
    except TypeError:               # Pillow without FreeType: the fixed bitmap font
        return ImageFont.load_default()


def label_point(mask: np.ndarray) -> tuple[float, float]:
    """(row, col) texel centre of `mask` farthest from its edge (the diagnosis's own rule)."""
    r, c = label_texel(mask)
    return r + 0.5, c + 0.5


def outline_regions(image: np.ndarray, regions: list[Region], texels: int, display: int = 768) -> Image.Image:
    """The painted map scaled to `display` px (nearest: texels stay sharp) with each region's
    contour drawn and its number 1.. (order given) placed inside it."""
    k = max(1, -(-display // texels))
    big = np.repeat(np.repeat(image, k, axis=0), k, axis=1)
    for r in regions:
        if not r.mask.any():
            continue
        r0, c0, r1, c1 = r.box
        full = np.zeros((texels, texels), bool)
        full[r0:r1, c0:c1] = r.mask
        m = np.repeat(np.repeat(full, k, axis=0), k, axis=1)
        inner = m & ~ndimage.binary_erosion(m, iterations=2)          # 2 px inside the edge
        outer = ndimage.binary_dilation(m, iterations=2) & ~m           # 2 px outside it
        big[outer] = INK
        big[inner] = MARK
    im = Image.fromarray(big).resize((display, display), Image.NEAREST)
    draw = ImageDraw.Draw(im)
    s = display / texels
    font = _font(max(15, display // 34))
    for r in regions:
        if not r.mask.any():
            continue
        pr, pc = label_point(r.mask)
        badge(draw, (r.box[1] + pc) * s, (r.box[0] + pr) * s, r.number, font)
    return im


def badge(draw: ImageDraw.ImageDraw, x: float, y: float, n: int, font: ImageFont.ImageFont) -> None:
    """Region number n in a dark disc with a yellow ring, centred on (x, y) pixels."""
    tb = draw.textbbox((x, y), str(n), font=font, anchor="mm")
    rad = max(tb[2] - tb[0], tb[3] - tb[1]) / 2 + 5
    draw.ellipse((x - rad, y - rad, x + rad, y + rad), fill=INK, outline=MARK, width=2)
    draw.text((x, y), str(n), font=font, fill=MARK, anchor="mm")


def surface_texture(f: ErrorFields, gutter: int = 4) -> np.ndarray:
    """(T, T, 3) uint8: the painted map with its islands padded `gutter` texels outwards, so
    filtered lookups at island borders on a 3D model never mix in the white of "no surface"."""
    on = f.cls != OFF
    filled = fill_texture(painted(f).astype(np.float32), on, on, gutter)
    return np.clip(np.rint(filled), 0, 255).astype(np.uint8)
