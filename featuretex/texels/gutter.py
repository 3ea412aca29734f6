"""Filling a texture where nothing was measured: pull-push inside, nearest-island gutter outside."""

from __future__ import annotations

import numpy as np
from scipy import ndimage


def pull_push(tex: np.ndarray, known: np.ndarray) -> np.ndarray:
    """Fill unknown texels of `tex` (T, T, C) from `known` (T, T) bool by a weighted mip pyramid:
    each unknown texel takes the coarsest-needed average of nearby known texels (smooth, no streaks)."""
    levels = [(np.where(known[..., None], tex, 0).astype(np.float64), known.astype(np.float64))]
    while min(levels[-1][1].shape) > 1:
        c, w = levels[-1]
        h, wd = (c.shape[0] + 1) // 2 * 2, (c.shape[1] + 1) // 2 * 2
        cp = np.zeros((h, wd, c.shape[2]))
        wp = np.zeros((h, wd))
        cp[: c.shape[0], : c.shape[1]] = c
        wp[: w.shape[0], : w.shape[1]] = w
        cs = cp.reshape(h // 2, 2, wd // 2, 2, -1).sum(axis=(1, 3))
        ws = wp.reshape(h // 2, 2, wd // 2, 2).sum(axis=(1, 3))
        levels.append((cs, ws))
    # push: from coarse to fine, unknown texels take the (normalised) coarser value
    colour = levels[-1][0] / np.maximum(levels[-1][1], 1e-12)[..., None]
    for c, w in reversed(levels[:-1]):
        up = np.repeat(np.repeat(colour, 2, axis=0), 2, axis=1)[: c.shape[0], : c.shape[1]]
        own = c / np.maximum(w, 1e-12)[..., None]
        alpha = np.clip(w, 0, 1)[..., None]  # fraction of this texel's area that is known
        colour = alpha * own + (1 - alpha) * up
    out = tex.astype(np.float64).copy()
    out[~known] = colour[~known]
    return out.astype(np.float32)


def fill_texture(tex: np.ndarray, seen: np.ndarray, on_surface: np.ndarray, gutter: int) -> np.ndarray:
    """(T, T, C) texture with every texel defined.

    seen: (T, T) bool, texels with a measured value; on_surface: (T, T) bool, texel centres inside a
    UV triangle. Unseen surface texels are filled by pull-push; off-surface texels within `gutter`
    texels of the surface copy their nearest surface texel (so bilinear and mip filtering at island
    borders never mix in a neighbouring island); the rest is the smooth pull-push fill.
    """
    filled = pull_push(tex, seen) if seen.any() else np.zeros_like(tex, dtype=np.float32)
    if not on_surface.any():
        return filled
    dist, (ri, ci) = ndimage.distance_transform_edt(~on_surface, return_indices=True)
    ring = (~on_surface) & (dist <= gutter)
    filled[ring] = filled[ri[ring], ci[ring]]
    return filled
