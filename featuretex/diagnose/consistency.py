"""Photo-consistency on the working UV grid.

Views are compared patch by patch with normalised cross-correlation (NCC), so texture detail and
each photo's own exposure do not read as disagreement: every view's patch is correlated with the
mean of the OTHER views over the same texels (leave-one-out), and the view scores are averaged.
Patches are square windows of the UV grid, evaluated for all texels at once with box filters.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage


@dataclass
class Samples:
    """One view's values at some texels of a D x D grid."""

    idx: np.ndarray      # (N,) int64 flat texel indices, each at most once (one view sees a texel once)
    value: np.ndarray    # (N,) or (N, C) float values
    weight: np.ndarray   # (N,) float weights (> 0)


def box_mean(a: np.ndarray, size: int) -> np.ndarray:
    """Mean over a size x size window (zeros outside the grid), float32 (values here are O(1), so
    float32 keeps patch variances of ~1e-4 to ~1e-3 relative), same shape as a (D, D)."""
    return ndimage.uniform_filter(np.asarray(a, np.float32), size=size, mode="constant", cval=0.0)


def masked_box_mean(a: np.ndarray, mask: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """(mean of a over the window's masked texels, fraction of the window masked); a, mask (D, D)."""
    m = box_mean(mask, size)
    s = box_mean(np.where(mask, a, 0.0), size)
    return np.where(m > 0, s / np.maximum(m, 1e-12), np.nan), m


def _bbox(idx: np.ndarray, D: int, margin: int) -> tuple[slice, slice]:
    r, c = idx // D, idx % D
    return (slice(max(int(r.min()) - margin, 0), min(int(r.max()) + margin + 1, D)),
            slice(max(int(c.min()) - margin, 0), min(int(c.max()) + margin + 1, D)))


def loo_ncc(views: list[Samples], D: int, *, patch: int, min_fill: float, min_contrast: float,
            trim: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Per texel, the weighted mean over views of NCC(view patch, leave-one-out mean patch).

    trim > 0: instead, the plain mean after dropping that fraction of the lowest view scores
    (a highlight or an occlusion that spoils one view does not drag the texel down).

    views: scalar values (sRGB luma). Returns (score (D*D,) float32, NaN where no view pair
    judged it; weight (D*D,) float32, the summed weights of the views that did). A view's NCC
    counts where it sees the texel, the patch is at least `min_fill` seen by it and another view,
    and its own patch has a standard deviation of at least `min_contrast`.
    """
    S = np.zeros(D * D)
    W = np.zeros(D * D)
    for v in views:
        S[v.idx] += v.weight * v.value
        W[v.idx] += v.weight
    score = np.zeros(D * D)
    wsum = np.zeros(D * D)
    per_view = np.full((D * D, len(views)), np.nan, np.float32) if trim > 0 else None   # texel-major
    S2, W2 = S.reshape(D, D), W.reshape(D, D)
    margin = patch // 2 + 1
    for j, v in enumerate(views):
        if len(v.idx) == 0:
            continue
        rs, cs = _bbox(v.idx, D, margin)
        h, w = rs.stop - rs.start, cs.stop - cs.start
        local = (v.idx // D - rs.start) * w + (v.idx % D - cs.start)
        g = np.zeros(h * w, np.float32)
        wv = np.zeros(h * w, np.float32)
        g[local] = v.value
        wv[local] = v.weight
        g, wv = g.reshape(h, w), wv.reshape(h, w)
        rest = W2[rs, cs] - wv
        joint = (wv > 0) & (rest > 1e-9)
        M = np.where(joint, (S2[rs, cs] - wv * g) / np.where(joint, rest, 1.0), 0.0)
        n = box_mean(joint, patch)
        inv = 1.0 / np.maximum(n, 1e-12)
        jg, jM = np.where(joint, g, 0.0), M
        mg, mM = box_mean(jg, patch) * inv, box_mean(jM, patch) * inv
        vg = box_mean(jg * jg, patch) * inv - mg * mg
        vM = box_mean(jM * jM, patch) * inv - mM * mM
        cov = box_mean(jg * jM, patch) * inv - mg * mM
        c2 = min_contrast ** 2
        # the view's own patch must carry texture; a flat mean of the others (they disagree and
        # blur each other) is floored, so it scores near 0 instead of counting as no evidence
        ok = joint & (n >= min_fill) & (vg >= c2)
        ncc = np.where(ok, cov / np.sqrt(np.maximum(vg * np.maximum(vM, c2), 1e-30)), 0.0)
        ok_l = ok.ravel()[local]
        score[v.idx[ok_l]] += v.weight[ok_l] * ncc.ravel()[local][ok_l]
        wsum[v.idx[ok_l]] += v.weight[ok_l]
        if per_view is not None:
            per_view[v.idx[ok_l], j] = ncc.ravel()[local][ok_l]
    if per_view is not None:
        return trimmed_mean(per_view, trim)
    out = np.where(wsum > 0, score / np.maximum(wsum, 1e-30), np.nan)
    return out.astype(np.float32), wsum.astype(np.float32)


def trimmed_mean(values: np.ndarray, trim: float) -> tuple[np.ndarray, np.ndarray]:
    """Per row of values (N, V) (NaN = no value): mean after dropping floor(trim * n) of the n
    lowest values, and the number kept (float32); NaN / 0 for empty rows."""
    fin = np.isfinite(values)
    n = fin.sum(axis=1)
    srt = np.sort(np.where(fin, values, np.inf), axis=1)          # lowest first, gaps last
    cs = np.cumsum(np.where(np.isfinite(srt), srt, 0.0), axis=1, dtype=np.float32)
    cs = np.concatenate([np.zeros((len(values), 1), np.float32), cs], axis=1)
    drop = np.floor(trim * n).astype(np.int64)
    rows = np.arange(len(values))
    kept = n - drop
    total = cs[rows, n] - cs[rows, drop]
    out = np.where(kept > 0, total / np.maximum(kept, 1), np.nan)
    return out.astype(np.float32), kept.astype(np.float32)


def consensus(views: list[Samples], n_texels: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Weighted mean (n_texels, C), weighted variance (n_texels,) averaged over channels, and the
    summed weight (n_texels,) of per-view vector values; NaN / 0 where no view."""
    C = views[0].value.shape[1] if views else 1
    s = np.zeros((n_texels, C))
    s2 = np.zeros(n_texels)
    w = np.zeros(n_texels)
    for v in views:
        s[v.idx] += v.weight[:, None] * v.value
        w[v.idx] += v.weight
    mean = np.where(w[:, None] > 0, s / np.maximum(w, 1e-30)[:, None], np.nan)
    for v in views:
        d = v.value - mean[v.idx]
        s2[v.idx] += v.weight * (d * d).mean(1)
    var = np.where(w > 0, s2 / np.maximum(w, 1e-30), np.nan)
    return mean, var, w
