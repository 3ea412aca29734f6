"""Look closer: the places where the delivered texture and the classical bake differ most, cut at
full resolution out of the held-out views, with the held-out photo beside them.

The places are chosen from the two renders alone: both textures are made from the fitted photos
only, and a render is that texture seen through the held-out view's geometry. The held-out photo
plays no part in the choice, so the crops are not picked where the delivered texture happens to
match it best. What counts is detail that changed (the difference minus its blurred self): a
uniform shift of colour between the two textures does not draw the eye to one place.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
from PIL import Image
from scipy import ndimage

HIGH_PASS_SIGMA = 4.0     # pixels: differences finer than this are "detail"
MIN_INSIDE = 0.6          # a crop must lie at least this much on the object


@dataclass(frozen=True)
class Detail:
    """One place to look at: a square crop of a held-out view."""

    view: str
    box: tuple[int, int, int, int]        # (x0, y0, x1, y1) pixels, exclusive ends
    score: float                          # mean high-passed squared difference inside (sRGB^2)


def read_rgb(path: Path) -> np.ndarray:
    """(H, W, 3) float32 sRGB in [0, 1]."""
    with Image.open(path) as im:
        return np.asarray(im.convert("RGB"), np.float32) / 255.0


def detail_energy(before: np.ndarray, after: np.ndarray) -> np.ndarray:
    """(H, W) float32: squared high-passed difference of two (H, W, 3) renders, summed over colour."""
    d = after - before
    hp = d - ndimage.gaussian_filter(d, sigma=(HIGH_PASS_SIGMA, HIGH_PASS_SIGMA, 0), mode="nearest")
    return (hp ** 2).sum(axis=-1).astype(np.float32)


def windows(energy: np.ndarray, inside: np.ndarray, crop: int, most: int) -> list[tuple[tuple[int, int, int, int], float]]:
    """Up to `most` non-overlapping crop x crop windows (fully inside the image, >= MIN_INSIDE on the
    object) of highest mean energy, best first: [((x0, y0, x1, y1), mean), ...]."""
    H, W = energy.shape
    if H < crop or W < crop:
        return []
    half = crop // 2
    mean = ndimage.uniform_filter(np.where(inside, energy, 0.0).astype(np.float64), crop, mode="constant")
    cover = ndimage.uniform_filter(inside.astype(np.float64), crop, mode="constant")
    # uniform_filter centres an even window on index i: it spans i - crop // 2 .. i + crop // 2 - 1
    valid = np.zeros((H, W), bool)
    valid[half:H - crop + half + 1, half:W - crop + half + 1] = True
    score = np.where(valid & (cover >= MIN_INSIDE), mean, -1.0)
    out = []
    while len(out) < most:
        i, j = np.unravel_index(int(np.argmax(score)), score.shape)
        if score[i, j] <= 0:
            break
        y0, x0 = int(i) - half, int(j) - half
        out.append(((x0, y0, x0 + crop, y0 + crop), float(score[i, j])))
        score[max(0, i - crop + 1):i + crop, max(0, j - crop + 1):j + crop] = -1.0   # no overlap
    return out


Locate = Callable[[str, float, float], "np.ndarray | None"]


def choose(renders: dict[str, tuple[Path, Path]], count: int = 3, crop: int = 128, *,
           locate: Locate | None = None, apart: float = 0.0) -> list[Detail]:
    """Up to `count` details, largest change first, in different places. renders: view ->
    (classical render, delivered render) PNG paths (black outside the object). Crops are `crop`
    pixels square, or as large as a smaller image allows.

    locate(view, x, y) -> the surface point (3,) seen at pixel (x, y) of a view, or None; details
    whose points lie closer than `apart` are the same place, and only the first is kept. Without
    `locate`, places are told apart by taking at most one detail per view.
    """
    candidates = []
    for view, (before_png, after_png) in renders.items():
        before, after = read_rgb(before_png), read_rgb(after_png)
        if before.shape != after.shape:
            continue
        inside = (before.max(axis=-1) > 0) | (after.max(axis=-1) > 0)
        most = count if locate is not None else 1
        side = min(crop, before.shape[0] // 2, before.shape[1] // 2)
        candidates += [Detail(view, box, score) for box, score in
                       windows(detail_energy(before, after), inside, side, most)]
    chosen: list[tuple[Detail, np.ndarray | None]] = []
    for d in sorted(candidates, key=lambda d: -d.score):
        p = locate(d.view, (d.box[0] + d.box[2]) / 2, (d.box[1] + d.box[3]) / 2) if locate else None
        if p is not None and any(q is not None and np.linalg.norm(p - q) < apart for _, q in chosen):
            continue
        chosen.append((d, p))
        if len(chosen) == count:
            break
    return [d for d, _ in chosen]


def locator(views: dict, caster) -> Locate:
    """locate(view, x, y) for `choose`: the first surface point of model (a stills.Caster, scene
    frame) along the pixel's ray of a scene view (featuretex.scene.manifest.View by name)."""
    def locate(name: str, x: float, y: float) -> np.ndarray | None:
        v = views.get(name)
        if v is None:
            return None
        d = v.camera.unproject(np.array([[x, y]])) @ v.R          # camera ray -> world (R^T d)
        p = caster.first_hits(v.centre[None], d)[0]
        return None if np.isnan(p).any() else p
    return locate


def cut(path: Path, box: tuple[int, int, int, int]) -> Image.Image:
    """The crop `box` of an image file, as RGB."""
    with Image.open(path) as im:
        return im.convert("RGB").crop(box)
