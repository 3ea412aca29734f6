"""The numbered problem regions of a scan: the connected patches of each problem class that the
map, the reasons, summary.json (`regions`) and the report all refer to by the same number.

Up to `per_class` of the largest 8-connected patches of each problem class covering at least
`min_share` of the surface, numbered from 1: the class the verdict is about first, then the
others, each class largest first (so a vast uncovered area cannot crowd out the geometry error a
verdict names). Uncovered patches inside cavities are not numbered: no photo could fix them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from featuretex.diagnose import classify as C

# class codes of the problem classes, and their names in summary.json
PROBLEM_CLASSES = {C.GEOMETRY: "geometry", C.TEXTURE: "texture", C.UNCOVERED: "uncovered"}
VERDICT_CLASS = {"fix-geometry": C.GEOMETRY, "refine-texture": C.TEXTURE, "rescan": C.UNCOVERED}


@dataclass
class NumberedRegion:
    number: int                # 1.. as drawn on the map
    code: int                  # class code (featuretex.diagnose.classify)
    mask: np.ndarray           # (D, D) bool on the working grid
    share: float               # fraction of the surface area
    area: float                # scene units^2
    centre: np.ndarray         # (3,) float64 area-weighted mean position, scene units
    offset: float              # median displacement along the normal inside, scene units (NaN: none)
    marker: np.ndarray         # (3,) float64 the surface point at the texel farthest from the region's
                               # edge, scene units: where a number is pinned (inside even a ring)

    @property
    def name(self) -> str:
        return PROBLEM_CLASSES[self.code]


def number_regions(cls: np.ndarray, area: np.ndarray, pos: np.ndarray, hidden: np.ndarray,
                   displacement: np.ndarray, verdict: str, *, per_class: int = 3,
                   min_share: float = 0.001) -> list[NumberedRegion]:
    """cls: (D, D) uint8 classes; area: (D, D) texel areas, scene units^2 (0 off the surface);
    pos: (D, D, 3) positions; hidden: (D, D) bool cavity texels; displacement: (D, D) scene units."""
    total = float(area[cls != C.OFF].sum())
    if total <= 0:
        return []
    found: list[NumberedRegion] = []
    for code in PROBLEM_CLASSES:
        mask = cls == code
        if code == C.UNCOVERED:
            mask &= ~hidden
        lab, n = ndimage.label(mask, structure=np.ones((3, 3), bool))
        if n == 0:
            continue
        sums = ndimage.sum_labels(area, lab, index=np.arange(1, n + 1))
        for k in np.argsort(-sums, kind="stable")[:per_class]:
            if sums[k] / total < min_share:
                break
            m = lab == k + 1
            a = area[m]
            d = displacement[m]
            d = d[np.isfinite(d)]
            found.append(NumberedRegion(0, code, m, float(sums[k]) / total, float(sums[k]),
                                        (pos[m].astype(np.float64) * a[:, None]).sum(0) / max(float(a.sum()), 1e-30),
                                        float(np.median(d)) if len(d) else float("nan"),
                                        pos[label_texel(m)].astype(np.float64)))
    first = VERDICT_CLASS.get(verdict)
    order = sorted(found, key=lambda r: (r.code != first, list(PROBLEM_CLASSES).index(r.code), -r.share))
    for i, r in enumerate(order, 1):
        r.number = i
    return order


def label_texel(mask: np.ndarray) -> tuple[int, int]:
    """(row, col) of the texel of `mask` farthest from its edge (Euclidean distance transform): a
    label placed there sits inside the region even when the region is a ring or a crescent."""
    dist = ndimage.distance_transform_edt(np.pad(mask, 1))[1:-1, 1:-1]
    r, c = np.unravel_index(int(np.argmax(dist)), mask.shape)
    return int(r), int(c)


def label_map(regions: list[NumberedRegion], shape: tuple[int, int]) -> np.ndarray:
    """(D, D) int16 region number per texel, 0 outside every numbered region."""
    out = np.zeros(shape, np.int16)
    for r in regions:
        out[r.mask] = r.number
    return out


def legend_lines(entries: list[dict]) -> list[str]:
    """Error-map legend lines: per numbered region, which fix pays more, in estimated dB of held-out
    PSNR (from the fitted views), e.g. '1 geometry: fix geometry +0.8 dB > fit longer +0.1 dB'."""
    parts = []
    for e in entries:
        if e["class"] == "uncovered":
            parts.append(f"{e['number']} uncovered: rescan")
            continue
        g, t = e["payoff_db"]["geometry"], e["payoff_db"]["texture"]
        rel = ">" if g > t else "<"
        parts.append(f"{e['number']} {e['class']}: fix geometry {_db(g)} {rel} fit longer {_db(t)}")
    if not parts:
        return []
    lines, line = [], "numbered regions (estimated held-out PSNR gain):"
    for p in parts:
        if len(line) + len(p) > 95:
            lines.append(line)
            line = "  "
        line += ("  " if line.strip() else "") + p + ";"
    return lines + [line]


def _db(x: float) -> str:
    x = round(x, 2) + 0.0          # no "-0.00"
    return f"{x:+.2f} dB"


def draw_numbers(img, labels: np.ndarray, entries: list[dict]) -> None:
    """Outline each numbered region on the PIL image (its top-left holds the S x S map; labels (S, S)
    int) and write its number inside, with 'G' or 'T' for the fix estimated to pay more."""
    from PIL import ImageDraw

    from featuretex.diagnose.palette import _font

    S = labels.shape[0]
    px = np.asarray(img)[:S, :S].copy()
    for e in entries:
        m = labels == e["number"]
        edge = m & ~ndimage.binary_erosion(m, iterations=2)
        px[edge] = (16, 16, 16)
    img.paste(_from(px), (0, 0))
    d = ImageDraw.Draw(img)
    font = _font(max(14, S // 40))
    for e in entries:
        m = labels == e["number"]
        if not m.any():
            continue
        r, c = label_texel(m)
        tag = "" if e["class"] == "uncovered" else \
            (" G" if e["payoff_db"]["geometry"] > e["payoff_db"]["texture"] else " T")
        d.text((c, r), f"{e['number']}{tag}", fill=(255, 255, 255), font=font, anchor="mm",
               stroke_width=2, stroke_fill=(16, 16, 16))


def _from(px: np.ndarray):
    from PIL import Image

    return Image.fromarray(px, "RGB")
