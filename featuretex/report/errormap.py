"""The report's picture of the diagnosis: error_map.npz painted with the diagnosis's own palette
(the same colours as error_map.png and diagnosis.ply), and its largest problem regions found,
ranked and outlined.

Classes come from the npz's `cls` field (featuretex.diagnose.classify). An npz without it is
classified here by the diagnosis's rule: uncovered if coverage < min_views, else geometry if
geometry >= 0.5, else texture if texture >= 0.5, else fine.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFont
from scipy import ndimage

from featuretex.diagnose.classify import FINE, GEOMETRY, OFF, TEXTURE, UNCOVERED, from_severity, severity
from featuretex.diagnose.palette import paint

# the classes whose regions are numbered (cavities ask nothing of anyone, so they are not)
KINDS = {GEOMETRY: "geometry", TEXTURE: "texture", UNCOVERED: "uncovered"}
MARK, INK = (255, 230, 60), (16, 16, 16)     # region outlines and number badges


@dataclass(frozen=True)
class Region:
    """One connected problem region in texel space (row 0 = top of the texture image)."""

    kind: str                 # "geometry" | "texture" | "uncovered"
    share: float              # fraction of the surface area, 0..1
    area: float | None        # scene units^2, when texel areas are known
    score: float              # mean of the class's field over the region, 0..1 (NaN for uncovered)
    box: tuple[int, int, int, int]   # (row0, col0, row1, col1), inclusive-exclusive, texels
    uv: tuple[float, float]   # (u, v) of the box centre, v up
    centre: tuple[float, float, float] | None   # area-weighted mean position, scene units
    offset: float             # median displacement along the normal inside, scene units (NaN: none)
    mask: np.ndarray = field(repr=False, compare=False, default=None)   # (r1-r0, c1-c0) bool inside the box


@dataclass
class ErrorFields:
    """error_map.npz on its T x T texel grid, with where the surface is and what each texel weighs."""

    cls: np.ndarray           # (T, T) uint8 class (featuretex.diagnose.classify)
    geometry: np.ndarray      # (T, T) float32 0..1, NaN unknown
    texture: np.ndarray       # (T, T) float32 0..1, NaN unknown
    displacement: np.ndarray  # (T, T) float32 scene units, NaN unknown
    weight: np.ndarray        # (T, T) float64 surface area per texel (scene units^2), or 1 per surface texel
    position: np.ndarray | None   # (T, T, 3) float32 surface point per texel, scene units
    area_known: bool


@dataclass
class Layout:
    """The exported model's UV layout sampled at T x T texel centres."""

    surface: np.ndarray       # (T, T) bool
    area: np.ndarray          # (T, T) float64 scene units^2 per texel (0 off the surface)
    position: np.ndarray      # (T, T, 3) float32 scene units


def layout_of(mesh, size: int) -> Layout:
    """Texel centres inside a UV triangle of `mesh` (a SceneMesh), each standing for (3D area / UV
    area of its triangle) / T^2, and the surface point it maps to (the mesh's own frame and unit)."""
    from featuretex.diagnose.grid import texel_areas
    from featuretex.raster.uvspace import rasterise_uv

    texels = rasterise_uv(mesh, size)
    return Layout(texels.valid, texel_areas(mesh, texels), texels.position)


def classify(coverage: np.ndarray, geometry: np.ndarray, texture: np.ndarray, surface: np.ndarray,
             min_views: int = 2) -> np.ndarray:
    """(T, T) uint8 classes by the diagnosis's rule (for an npz without `cls`)."""
    cls = np.where(surface, FINE, OFF).astype(np.uint8)
    known = surface & (np.nan_to_num(coverage) >= min_views)
    geo = known & (np.nan_to_num(geometry) >= 0.5)
    cls[known & ~geo & (np.nan_to_num(texture) >= 0.5)] = TEXTURE
    cls[geo] = GEOMETRY
    cls[surface & ~known] = UNCOVERED
    return cls


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


def load_fields(npz: Path, layout: Layout | None = None, min_views: int = 2, k: int = 1) -> ErrorFields:
    """Read error_map.npz, pooled over k x k texel blocks; `layout` (at the pooled size) supplies
    texel areas and positions."""
    with np.load(npz) as z:
        geo = _block_mean(np.asarray(z["geometry"], np.float32), k)
        tex = _block_mean(np.asarray(z["texture"], np.float32), k)
        cov = _block_mean(np.asarray(z["coverage"], np.float32), k)
        disp = _block_mean(np.asarray(z["displacement"], np.float32), k) if "displacement" in z.files \
            else np.full(geo.shape, np.nan, np.float32)
        cls = _block_worst(np.asarray(z["cls"], np.uint8), k) if "cls" in z.files else None
    lay = layout if layout is not None and layout.surface.shape == geo.shape else None
    if cls is None:
        surface = lay.surface if lay is not None else np.ones(geo.shape, bool)
        cls = classify(cov, geo, tex, surface, min_views)
    on = cls != OFF
    weight = np.where(on, lay.area, 0.0) if lay is not None else on.astype(np.float64)
    return ErrorFields(cls, geo, tex, disp, weight, lay.position if lay is not None else None, lay is not None)


def find_regions(f: ErrorFields, *, per_class: int = 3, min_share: float = 0.001,
                 first: str | None = None) -> list[Region]:
    """Up to `per_class` largest 8-connected regions of each problem class covering >= min_share of
    the surface: the `first` class (the one the verdict is about) leading, then the rest largest
    first, so a vast uncovered area cannot crowd out the geometry error a verdict names."""
    total = float(f.weight.sum()) or 1.0
    T = f.cls.shape[0]
    found: list[Region] = []
    for code, kind in KINDS.items():
        labels, n = ndimage.label(f.cls == code, structure=np.ones((3, 3), bool))
        if n == 0:
            continue
        field = {GEOMETRY: f.geometry, TEXTURE: f.texture}.get(code)
        for k, sl in enumerate(ndimage.find_objects(labels), 1):
            m = labels[sl] == k
            w = f.weight[sl][m]
            share = float(w.sum()) / total
            if share < min_share:
                continue
            score = float(np.nanmean(field[sl][m])) if field is not None and np.isfinite(field[sl][m]).any() \
                else float("nan")
            d = f.displacement[sl][m]
            d = d[np.isfinite(d)]
            centre = None
            if f.position is not None and w.sum() > 0:
                centre = tuple(float(c) for c in (f.position[sl][m] * w[:, None]).sum(0) / w.sum())
            r0, r1, c0, c1 = sl[0].start, sl[0].stop, sl[1].start, sl[1].stop
            found.append(Region(kind, share, float(w.sum()) if f.area_known else None, score, (r0, c0, r1, c1),
                                ((c0 + c1) / 2 / T, 1.0 - (r0 + r1) / 2 / T), centre,  # type: ignore[arg-type]
                                float(np.median(d)) if len(d) else float("nan"), m))
    kept: list[Region] = []
    for kind in KINDS.values():
        kept += sorted((r for r in found if r.kind == kind), key=lambda r: -r.share)[:per_class]
    return sorted(kept, key=lambda r: (r.kind != first, -r.share))


def painted(f: ErrorFields) -> np.ndarray:
    """(T, T, 3) uint8 sRGB map in the diagnosis's palette."""
    return paint(f.cls, f.geometry, f.texture)


def _font(size: int) -> ImageFont.ImageFont:
    try:
        return ImageFont.load_default(size=size)
    except TypeError:               # Pillow without FreeType: the fixed bitmap font
        return ImageFont.load_default()


def label_point(mask: np.ndarray) -> tuple[float, float]:
    """(row, col) texel centre of `mask` farthest from its edge: a label there sits inside the
    region even when the region is a ring or a crescent."""
    dist = ndimage.distance_transform_edt(np.pad(mask, 1))[1:-1, 1:-1]
    r, c = np.unravel_index(int(np.argmax(dist)), mask.shape)
    return r + 0.5, c + 0.5


def outline_regions(image: np.ndarray, regions: list[Region], texels: int, display: int = 768) -> Image.Image:
    """The painted map scaled to `display` px (nearest: texels stay sharp) with each region's
    contour drawn and its number 1.. (order given) placed inside it."""
    k = max(1, -(-display // texels))
    big = np.repeat(np.repeat(image, k, axis=0), k, axis=1)
    for r in regions:
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
    for i, r in enumerate(regions, 1):
        pr, pc = label_point(r.mask)
        badge(draw, (r.box[1] + pc) * s, (r.box[0] + pr) * s, i, font)
    return im


def badge(draw: ImageDraw.ImageDraw, x: float, y: float, n: int, font: ImageFont.ImageFont) -> None:
    """Region number n in a dark disc with a yellow ring, centred on (x, y) pixels."""
    tb = draw.textbbox((x, y), str(n), font=font, anchor="mm")
    rad = max(tb[2] - tb[0], tb[3] - tb[1]) / 2 + 5
    draw.ellipse((x - rad, y - rad, x + rad, y + rad), fill=INK, outline=MARK, width=2)
    draw.text((x, y), str(n), font=font, fill=MARK, anchor="mm")


def region_ids(regions: list[Region], texels: int) -> np.ndarray:
    """(T, T) int32: 1 + the index of the region holding each texel, 0 elsewhere."""
    ids = np.zeros((texels, texels), np.int32)
    for i, r in enumerate(regions, 1):
        r0, c0, r1, c1 = r.box
        ids[r0:r1, c0:c1][r.mask] = i
    return ids


def surface_texture(f: ErrorFields, gutter: int = 4) -> np.ndarray:
    """(T, T, 3) uint8: the painted map with its islands padded `gutter` texels outwards, so
    filtered lookups at island borders on a 3D model never mix in the white of "no surface"."""
    from featuretex.bake.gutter import fill_texture

    on = f.cls != OFF
    filled = fill_texture(painted(f).astype(np.float32), on, on, gutter)
    return np.clip(np.rint(filled), 0, 255).astype(np.uint8)
