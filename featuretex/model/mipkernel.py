"""Compiled (numba) kernels of trilinear mip sampling: one pass per pixel instead of tap tables.

`mip_forward` computes, for each pixel, the same taps as texture.mip_taps (level of detail ->
two levels, four bilinear texels each, with the same float64 coordinates and float32 weights)
and blends the texels in place; it also records the taps, (N, 8) rows and weights (weight 0 for
an unused slot), for `mip_scatter`, which scatters the incoming gradient back along them.

Why compiled: in torch the taps become a dozen (N, 8) intermediate tensors and a gather /
index_add per part, all memory-bound; one compiled pass per pixel reads each tap once. The
backward adds every texel's terms in pixel order, however many threads share the work, so
gradients are bit-for-bit deterministic.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from featuretex.compiled import CACHE   # numba settings, before any kernel is defined


@njit(parallel=True, cache=CACHE, boundscheck=False)
def mip_forward(level0: np.ndarray, coarse: np.ndarray, uv: np.ndarray, lam: np.ndarray, sizes: np.ndarray,
                bases: np.ndarray, top: int, out: np.ndarray, idx: np.ndarray, wts: np.ndarray) -> None:  # pragma: no cover - compiled
    """out (N, K) = trilinear samples; idx (N, 8) int64 pyramid rows, wts (N, 8) float32 their weights.

    level0 (T*T, K) float32 and coarse (rows, K) float32: the pyramid table split at row T*T
    (coarse holds levels 1.. as built by texture.coarse_table); uv (N, 2) float32 (v up);
    lam (N,) float32 level of detail already clamped to [0, top]; sizes, bases (levels + 1,)
    int64 edge length and first row of each level in the pyramid table.
    """
    N, K = out.shape
    TT = level0.shape[0]
    one = np.float32(1.0)
    zero = np.float32(0.0)
    for n in prange(N):
        lv = lam[n]
        l0 = int(math.floor(lv))
        if l0 > top:
            l0 = top
        frac = np.float32(lv - np.float32(l0))
        frac = min(max(frac, zero), one)
        if l0 >= top:
            frac = zero
        u = np.float64(uv[n, 0])
        v = np.float64(uv[n, 1])
        for k in range(K):
            out[n, k] = 0.0
        for j in range(2):
            if j == 1 and frac == zero:
                for t in range(4, 8):
                    idx[n, t] = 0
                    wts[n, t] = zero
                break
            lev = l0 + j
            s = sizes[lev]
            col = u * np.float64(s) - 0.5
            row = (1.0 - v) * np.float64(s) - 0.5
            fcol = math.floor(col)
            frow = math.floor(row)
            fc = np.float32(col - fcol)
            fr = np.float32(row - frow)
            c0 = int(fcol)
            r0 = int(frow)
            c1 = min(max(c0 + 1, 0), s - 1)
            r1 = min(max(r0 + 1, 0), s - 1)
            c0 = min(max(c0, 0), s - 1)
            r0 = min(max(r0, 0), s - 1)
            lw = (one - frac) if j == 0 else frac
            b = bases[lev]
            rows = (b + r0 * s + c0, b + r0 * s + c1, b + r1 * s + c0, b + r1 * s + c1)
            ws = (((one - fc) * (one - fr)) * lw, (fc * (one - fr)) * lw,
                  ((one - fc) * fr) * lw, (fc * fr) * lw)
            for t in range(4):
                rr = rows[t]
                w = ws[t]
                idx[n, 4 * j + t] = rr
                wts[n, 4 * j + t] = w
                if rr < TT:
                    for k in range(K):
                        out[n, k] += w * level0[rr, k]
                else:
                    for k in range(K):
                        out[n, k] += w * coarse[rr - TT, k]


@njit(parallel=True, cache=CACHE, boundscheck=False)
def mip_scatter(grad: np.ndarray, idx: np.ndarray, wts: np.ndarray, out: np.ndarray, lo: int,
                parts: int) -> None:  # pragma: no cover - compiled
    """out (R, K) += the adjoint of mip_forward for the taps with rows in [lo, lo + R) of the pyramid
    table (row - lo indexes out), from grad (N, K).

    Parallel over `parts` disjoint bands of out's rows: every part walks all taps in pixel order
    and adds only those landing in its band, so each row receives its terms in the same order
    whatever the number of parts (bit-identical results, no atomics)."""
    N, K = grad.shape
    R = out.shape[0]
    for part in prange(parts):
        a = lo + part * R // parts
        b = lo + (part + 1) * R // parts
        for n in range(N):
            for t in range(8):
                w = wts[n, t]
                rr = idx[n, t]
                if w == 0.0 or rr < a or rr >= b:
                    continue
                for k in range(K):
                    out[rr - lo, k] += w * grad[n, k]


@njit(parallel=True, cache=CACHE, boundscheck=False)
def downsample(x: np.ndarray, out: np.ndarray) -> None:  # pragma: no cover - compiled
    """out (ceil(s/2), ceil(s/2), K) = 2x2 box means of x (s, s, K); for odd s the last row / column
    is replicated first, i.e. averaged alone (as avg_pool2d with ceil_mode=True and
    count_include_pad=False, which the tests compare it with)."""
    s = x.shape[0]
    S, K = out.shape[0], out.shape[2]
    for i in prange(S):
        r0 = 2 * i
        r1 = min(r0 + 1, s - 1)
        for j in range(S):
            c0 = 2 * j
            c1 = min(c0 + 1, s - 1)
            for k in range(K):
                out[i, j, k] = (((x[r0, c0, k] + x[r1, c0, k]) + x[r0, c1, k]) + x[r1, c1, k]) * np.float32(0.25)


@njit(parallel=True, cache=CACHE, boundscheck=False)
def upsample_add(fine: np.ndarray, coarse: np.ndarray, accumulate: bool) -> None:  # pragma: no cover - compiled
    """fine (s, s, K) (+)= the adjoint of `downsample` applied to coarse: a quarter of each coarse
    value to each of its 2x2 texels; for odd s the last row / column also takes its replica's.
    accumulate=False overwrites fine (no need to zero it first)."""
    s, K = fine.shape[0], fine.shape[2]
    odd = s % 2 == 1
    for r in prange(s):
        mr = np.float32(2.0) if (odd and r == s - 1) else np.float32(1.0)
        i = r // 2
        for c in range(s):
            m = mr * (np.float32(2.0) if (odd and c == s - 1) else np.float32(1.0))
            j = c // 2
            for k in range(K):
                v = m * (coarse[i, j, k] * np.float32(0.25))
                fine[r, c, k] = fine[r, c, k] + v if accumulate else v
