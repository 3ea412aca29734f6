"""The error map on the model: six standard views with the classes painted as in the legend (lightly
shaded, so the shape reads), each numbered region outlined and numbered in the view that shows most
of it; written with the legend to error_map_views.png beside the report."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw
from scipy import ndimage

from featuretex.report import stills
from featuretex.report.errormap import INK, MARK, _font, badge, label_point

SHADING = 0.3          # up to 30 % darker where the surface turns away: shape without hiding the class
MIN_PIXELS = 12        # a region shown by fewer cast pixels than this is not marked in a view


@dataclass
class ErrorViews:
    names: list[str]                 # the six view names, in SIX_VIEWS order
    images: list[np.ndarray]         # per view (S, S, 3) uint8, regions marked
    shown_in: dict[int, int]         # region number -> index of the view that marks it


def render(caster: stills.Caster, texture: np.ndarray, ids: np.ndarray, size: int = 320) -> ErrorViews:
    """The six views of `texture` (T, T, 3) uint8 (the painted map), regions from `ids` (T', T')
    int32 (0 none, n = region n)."""
    # views along the glTF axes: the bounding box's longest side frames them all at one scale
    casts = [caster.cast(towards, up, size, half=caster.model.half) for _, towards, up in stills.SIX_VIEWS]
    images = [stills.paint(c, texture, nearest=True, shading=SHADING) for c in casts]
    seen = [stills.lookup(c, ids) for c in casts]
    n_regions = int(ids.max()) if ids.size else 0
    shown_in: dict[int, int] = {}
    for n in range(1, n_regions + 1):
        counts = [int((s == n).sum()) for s in seen]
        best = int(np.argmax(counts))
        if counts[best] >= MIN_PIXELS:
            shown_in[n] = best
    for k, img in enumerate(images):
        marks = [n for n, v in shown_in.items() if v == k]
        if marks:
            images[k] = _mark(img, seen[k], marks)
    return ErrorViews([name for name, _, _ in stills.SIX_VIEWS], images, shown_in)


def _mark(image: np.ndarray, seen: np.ndarray, numbers: list[int]) -> np.ndarray:
    """The still with each region's visible outline drawn and its number placed inside it."""
    out = image.copy()
    masks = {}
    for n in numbers:
        m = seen == n
        m = m.reshape(m.shape[0] // 2, 2, m.shape[1] // 2, 2).any(axis=(1, 3))   # cast -> still pixels
        masks[n] = m
        out[ndimage.binary_dilation(m, iterations=2) & ~m] = INK
        out[m & ~ndimage.binary_erosion(m, iterations=1)] = MARK
    im = Image.fromarray(out)
    draw = ImageDraw.Draw(im)
    font = _font(max(13, image.shape[0] // 22))
    for n, m in masks.items():
        r, c = label_point(m)
        badge(draw, c, r, n, font)
    return np.asarray(im)


def sheet(views: ErrorViews, columns: int = 3, gap: int = 8, caption_px: int = 22) -> np.ndarray:
    """(H, W, 3) uint8: the views in a grid, each captioned with its name."""
    S = views.images[0].shape[0]
    rows = -(-len(views.images) // columns)
    W = columns * S + (columns + 1) * gap
    H = rows * (S + caption_px) + (rows + 1) * gap
    im = Image.new("RGB", (W, H), (255, 255, 255))
    draw = ImageDraw.Draw(im)
    font = _font(14)
    for k, (name, img) in enumerate(zip(views.names, views.images)):
        x = gap + (k % columns) * (S + gap)
        y = gap + (k // columns) * (S + caption_px + gap)
        draw.text((x, y + 2), name, fill=(30, 30, 30), font=font)
        im.paste(Image.fromarray(img), (x, y + caption_px))
    return np.asarray(im)


def write_png(path: Path, views: ErrorViews, title: str, lines: list[str]) -> None:
    """error_map_views.png: the grid of views with the error map's legend below (atomically)."""
    import io

    from featuretex.atomic import write_bytes
    from featuretex.diagnose.palette import with_legend

    buf = io.BytesIO()
    with_legend(sheet(views), title, lines).save(buf, format="PNG", compress_level=6)
    write_bytes(path, buf.getvalue())
