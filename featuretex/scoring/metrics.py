"""Image quality scores of a render against a photo, inside the object mask (docs/contracts.md,
sections 4 and 5).

All images are (H, W, C) float arrays; `*_srgb` are sRGB-encoded values in [0, 1], `*_lin` are
linear light in [0, 1]. `mask` is (H, W) bool, True where a pixel is scored. Scores:

- `psnr`: 10 log10(1 / MSE) over mask pixels and all channels (peak 1), capped at PSNR_CAP_DB.
- `ssim`: Wang et al. 2004 (11-tap Gaussian window, sigma 1.5, K1 0.01, K2 0.03, data range 1,
  population covariance), per channel, mean of the SSIM map over mask pixels.
- `psnr_gaincomp`: PSNR after a per-channel gain, fitted in linear light, brings the render to the
  photo's own exposure.
- `psnr_tolerant`: like `psnr_gaincomp`, but each 16 x 16 tile of the render may move by the best
  integer shift within +-3 px, forgiving the small misplacement broken geometry causes.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numba import njit, prange
from scipy.ndimage import gaussian_filter

from featuretex.compiled import CACHE   # numba settings, before any kernel is defined
from featuretex.scene.colour import linear_to_srgb

PSNR_CAP_DB = 100.0          # identical images score this instead of +inf (JSON has no inf)
_MSE_FLOOR = 10.0 ** (-PSNR_CAP_DB / 10.0)
SSIM_SIGMA = 1.5
SSIM_TRUNCATE = 3.5          # radius int(3.5 * 1.5 + 0.5) = 5 -> 11 taps, as Wang et al. 2004
SSIM_K1, SSIM_K2 = 0.01, 0.03
MIN_SHIFT_OVERLAP = 0.5      # a tile shift counts only if it keeps >= half the tile's valid pixels
SCORE_KEYS = ("psnr", "ssim", "psnr_gaincomp", "psnr_tolerant")


def _check(a: np.ndarray, b: np.ndarray, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    mask = np.asarray(mask, dtype=bool)
    if a.ndim == 2:
        a, b = a[..., None], b[..., None]
    if a.shape != b.shape or a.shape[:2] != mask.shape:
        raise ValueError(f"shape mismatch: {a.shape}, {b.shape}, mask {mask.shape}")
    if not mask.any():
        raise ValueError("empty mask: no pixel to score")
    return a, b, mask


def mse_to_psnr(mse: float) -> float:
    """PSNR in dB of a mean squared error on [0, 1] values (peak 1), capped at PSNR_CAP_DB."""
    return float(-10.0 * math.log10(max(float(mse), _MSE_FLOOR)))


def psnr_to_mse(psnr_db: float) -> float:
    return float(10.0 ** (-float(psnr_db) / 10.0))


def psnr(a: np.ndarray, b: np.ndarray, mask: np.ndarray) -> float:
    """PSNR in dB of a against b over mask pixels, all channels, peak 1.

    a, b: (H, W, C) float in [0, 1]; mask: (H, W) bool.
    """
    a, b, mask = _check(a, b, mask)
    return mse_to_psnr(float(np.mean((a[mask] - b[mask]) ** 2)))


def ssim_map(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(H, W, C) float64 SSIM map (Wang et al. 2004), Gaussian window, reflected borders.

    a, b: (H, W, C) float, data range 1. Same filter as the reference formula: weighted means,
    variances and covariance from an isotropic Gaussian, population (not sample) covariance.
    """
    sig = (SSIM_SIGMA, SSIM_SIGMA, 0.0)  # filter the two image axes only, each channel alone

    def blur(x: np.ndarray) -> np.ndarray:
        return gaussian_filter(x, sigma=sig, truncate=SSIM_TRUNCATE, mode="reflect")

    ux, uy = blur(a), blur(b)
    vx = blur(a * a) - ux * ux
    vy = blur(b * b) - uy * uy
    vxy = blur(a * b) - ux * uy
    c1, c2 = SSIM_K1 ** 2, SSIM_K2 ** 2  # (K * data range)^2 with data range 1
    return ((2 * ux * uy + c1) * (2 * vxy + c2)) / ((ux * ux + uy * uy + c1) * (vx + vy + c2))


def ssim(a: np.ndarray, b: np.ndarray, mask: np.ndarray) -> float:
    """Mean SSIM over mask pixels and channels.

    a, b: (H, W, C) float in [0, 1]; mask: (H, W) bool. Pixels outside the mask are set to 0 in
    both images first, so that background the render does not model (the photo's table, sky...)
    cannot lower the score of windows that straddle the silhouette.
    """
    a, b, mask = _check(a, b, mask)
    a = np.where(mask[..., None], a, 0.0)
    b = np.where(mask[..., None], b, 0.0)
    return float(ssim_map(a, b)[mask].mean())


def fit_gain(render_lin: np.ndarray, photo_lin: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """(C,) per-channel gain g minimising sum over mask of (g * render - photo)^2, in linear light.

    Closed form of that least-squares problem: g = <r, p> / <r, r>; 1 where the render is all 0.
    """
    r, p, mask = _check(render_lin, photo_lin, mask)
    r, p = r[mask], p[mask]                       # (N, C)
    rr = np.sum(r * r, axis=0)
    rp = np.sum(r * p, axis=0)
    return np.where(rr > 0, rp / np.where(rr > 0, rr, 1.0), 1.0)


def gain_compensate(render_lin: np.ndarray, photo_lin: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """render_lin * g, with the per-channel gain g of :func:`fit_gain` (same shape and dtype)."""
    g = fit_gain(render_lin, photo_lin, mask)
    out = np.asarray(render_lin) * g.astype(np.asarray(render_lin).dtype)
    return out


def _shift_sse(render: np.ndarray, photo: np.ndarray, mask: np.ndarray, tile: int, radius: int
               ) -> tuple[np.ndarray, np.ndarray]:
    """Per tile and shift: squared-error sum and valid-value count.

    render, photo: (H, W, C) float64; mask: (H, W) bool. Returns sse, n: (TH, TW, S, S) with
    S = 2 * radius + 1, where [.., i, j] compares render pixel q with photo pixel
    q + (i - radius, j - radius), counting pixels valid in both (times C). Compiled: the numpy
    form with sliding windows builds large temporaries for every shift; the compiled loops accumulate
    in place.
    """
    h, w, c = render.shape
    th, tw = -(-h // tile), -(-w // tile)
    s = 2 * radius + 1
    sse = np.zeros((th, tw, s, s))
    cnt = np.zeros((th, tw, s, s))
    _shift_sse_kernel(np.ascontiguousarray(render, np.float64), np.ascontiguousarray(photo, np.float64),
                      np.ascontiguousarray(mask, np.bool_), tile, radius, sse, cnt)
    return sse, cnt * c


@njit(parallel=True, cache=CACHE, boundscheck=False)
def _shift_sse_kernel(render, photo, mask, tile, radius, sse, cnt):  # pragma: no cover - compiled
    h, w, c = render.shape
    th, tw, s = sse.shape[0], sse.shape[1], sse.shape[2]
    for ty in prange(th):
        for tx in range(tw):
            for y in range(ty * tile, min(h, (ty + 1) * tile)):
                for x in range(tx * tile, min(w, (tx + 1) * tile)):
                    if not mask[y, x]:
                        continue
                    for i in range(s):
                        yy = y + i - radius
                        if yy < 0 or yy >= h:
                            continue
                        for j in range(s):
                            xx = x + j - radius
                            if xx < 0 or xx >= w or not mask[yy, xx]:
                                continue
                            e = 0.0
                            for k in range(c):
                                d = render[y, x, k] - photo[yy, xx, k]
                                e += d * d
                            sse[ty, tx, i, j] += e
                            cnt[ty, tx, i, j] += 1.0


def tolerant_psnr(render_srgb: np.ndarray, photo_srgb: np.ndarray, mask: np.ndarray,
                  tile: int = 16, radius: int = 3) -> float:
    """PSNR in dB where each tile x tile block of the render may move by its best integer shift.

    render_srgb, photo_srgb: (H, W, C) float in [0, 1]; mask: (H, W) bool (valid in both images).
    For each tile, over the (2 radius + 1)^2 shifts (49 by default), the shift with the lowest
    mean squared error, counted over pixels valid in both images, is kept; a shift must keep at
    least MIN_SHIFT_OVERLAP of the tile's own valid pixels, so that a tile cannot slide off the
    object to hide its error. PSNR of the total: sum of kept squared errors / sum of kept counts.
    With radius 0 this is exactly :func:`psnr`.
    """
    a, b, mask = _check(render_srgb, photo_srgb, mask)
    if tile < 1 or radius < 0:
        raise ValueError("tile must be >= 1 and radius >= 0")
    sse, cnt = _shift_sse(a, b, mask, tile, radius)
    th, tw = sse.shape[:2]
    sse, cnt = sse.reshape(th * tw, -1), cnt.reshape(th * tw, -1)
    own = cnt[:, cnt.shape[1] // 2]                   # centre entry = shift (0, 0)
    ok = (cnt > 0) & (cnt >= MIN_SHIFT_OVERLAP * own[:, None])
    tile_mse = np.where(ok, sse / np.where(cnt > 0, cnt, 1), np.inf)
    best = np.argmin(tile_mse, axis=1)
    used = own > 0
    rows = np.arange(len(best))[used]
    total_sse = float(sse[rows, best[used]].sum())
    total_cnt = float(cnt[rows, best[used]].sum())
    return mse_to_psnr(total_sse / total_cnt)


def score_view(render_lin: np.ndarray, photo_lin: np.ndarray, mask: np.ndarray) -> dict[str, float]:
    """The four scores of one held-out view.

    render_lin, photo_lin: (H, W, 3) linear light in [0, 1]; mask: (H, W) bool.
    psnr and ssim compare the sRGB-encoded images as they are; psnr_gaincomp and psnr_tolerant
    compare the sRGB encoding of the gain-compensated render (exposure fitted in linear light).
    """
    photo = linear_to_srgb(photo_lin)
    render = linear_to_srgb(render_lin)
    comp = linear_to_srgb(gain_compensate(render_lin, photo_lin, mask))
    return {"psnr": psnr(render, photo, mask),
            "ssim": ssim(render, photo, mask),
            "psnr_gaincomp": psnr(comp, photo, mask),
            "psnr_tolerant": tolerant_psnr(comp, photo, mask)}


def aggregate(scores: Sequence[dict[str, float]], weights: Sequence[float]) -> dict[str, float]:
    """Combine per-view scores into one, weighting each view by its pixel count.

    PSNR-type keys are pooled through the MSE: each view's PSNR is turned back into its MSE, the
    MSEs are averaged with the weights, and the mean becomes one PSNR (the score of all pixels as
    one image, so a small view with a huge error cannot be averaged away in dB). SSIM is the
    weighted mean of the views' SSIM (= the mean of the SSIM map over all their pixels).
    """
    w = np.asarray(weights, dtype=np.float64)
    if len(scores) == 0 or len(w) != len(scores) or np.any(w < 0) or w.sum() <= 0:
        raise ValueError("need one non-negative weight per score, not all zero")
    w = w / w.sum()
    out: dict[str, float] = {}
    for key in scores[0]:
        vals = np.array([s[key] for s in scores], dtype=np.float64)
        if key.startswith("psnr"):
            out[key] = mse_to_psnr(float(np.sum(w * 10.0 ** (-vals / 10.0))))
        else:
            out[key] = float(np.sum(w * vals))
    return out
