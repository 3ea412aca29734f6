"""Scores against scikit-image and closed-form references."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

from featuretex.scene.colour import linear_to_srgb, srgb_to_linear
from featuretex.scoring import metrics


def _texture(rng: np.random.Generator, h: int, w: int, pad: int = 0) -> np.ndarray:
    """(h + 2 pad, w + 2 pad, 3) smooth random image in [0, 1]: structure on a few-pixel scale."""
    x = gaussian_filter(rng.random((h + 2 * pad, w + 2 * pad, 3)), sigma=(1.5, 1.5, 0))
    return np.clip((x - x.min()) / (x.max() - x.min()), 0, 1)


def _disc(h: int, w: int) -> np.ndarray:
    ys, xs = np.mgrid[0:h, 0:w]
    return (ys - h / 2) ** 2 + (xs - w / 2) ** 2 < (0.4 * min(h, w)) ** 2


def test_psnr_matches_skimage_on_full_image():
    rng = np.random.default_rng(0)
    a = rng.random((40, 50, 3))
    b = np.clip(a + rng.normal(0, 0.05, a.shape), 0, 1)
    full = np.ones((40, 50), bool)
    # scikit-image peak_signal_noise_ratio: 10 log10(range^2 / MSE) over all pixels and channels
    assert metrics.psnr(a, b, full) == pytest.approx(peak_signal_noise_ratio(a, b, data_range=1), abs=1e-9)


def test_psnr_uses_mask_pixels_only():
    rng = np.random.default_rng(1)
    a = rng.random((30, 30, 3))
    b = a.copy()
    mask = _disc(30, 30)
    b[~mask] = 1 - b[~mask]               # garbage outside the mask must not count
    b[mask] = np.clip(b[mask] + 0.01, 0, 1)
    # reference: scikit-image on the masked pixels alone, laid out as an (N, 3) "image"
    ref = peak_signal_noise_ratio(a[mask], b[mask], data_range=1)
    assert metrics.psnr(a, b, mask) == pytest.approx(ref, abs=1e-9)


def test_ssim_matches_skimage_map_inside_mask():
    rng = np.random.default_rng(2)
    a = _texture(rng, 48, 64)
    b = np.clip(0.9 * a + 0.05 + rng.normal(0, 0.03, a.shape), 0, 1)
    mask = _disc(48, 64)
    a0 = np.where(mask[..., None], a, 0.0)
    b0 = np.where(mask[..., None], b, 0.0)
    # scikit-image structural_similarity with the Wang et al. 2004 settings; mean of its full map
    # inside the mask (our ssim zeroes the outside of both images first, so we give it the same)
    _, smap = structural_similarity(a0, b0, gaussian_weights=True, sigma=1.5, use_sample_covariance=False,
                                    data_range=1, channel_axis=-1, full=True)
    ref = smap[mask].mean()
    got = metrics.ssim(a, b, mask)
    assert got == pytest.approx(ref, abs=1e-6)
    assert 0.2 < got < 0.99   # a real, imperfect match: the comparison is not between constants


def test_ssim_full_mask_matches_skimage_without_zeroing():
    rng = np.random.default_rng(3)
    a = _texture(rng, 32, 32)
    b = np.clip(a + rng.normal(0, 0.05, a.shape), 0, 1)
    full = np.ones((32, 32), bool)
    # scikit-image structural_similarity, Wang et al. 2004 settings, mean of the full map
    _, smap = structural_similarity(a, b, gaussian_weights=True, sigma=1.5, use_sample_covariance=False,
                                    data_range=1, channel_axis=-1, full=True)
    assert metrics.ssim(a, b, full) == pytest.approx(smap.mean(), abs=1e-6)


def test_gain_compensation_removes_exposure():
    rng = np.random.default_rng(4)
    photo = srgb_to_linear(_texture(rng, 32, 32))
    gain = np.array([0.7, 1.0, 1.3])
    render = photo / gain                # the photo is the render times a per-channel gain
    mask = _disc(32, 32)
    # least squares in closed form: with p = g r exactly, the fitted gain is g (to float precision)
    assert metrics.fit_gain(render, photo, mask) == pytest.approx(gain, rel=1e-6)
    comp = metrics.gain_compensate(render, photo, mask)
    assert np.abs(comp - photo)[mask].max() < 1e-6


def test_gain_is_the_least_squares_solution():
    rng = np.random.default_rng(5)
    r = rng.random((20, 20, 3))
    p = np.clip(1.2 * r + rng.normal(0, 0.1, r.shape), 0, 1)
    mask = rng.random((20, 20)) > 0.3
    g = metrics.fit_gain(r, p, mask)
    for c in range(3):
        # numpy's lstsq solution of the one-unknown system r g = p over the mask pixels
        ref, *_ = np.linalg.lstsq(r[mask][:, c:c + 1], p[mask][:, c], rcond=None)
        assert g[c] == pytest.approx(ref[0], rel=1e-9)


def _shift_pair(shift: int, noise: float, seed: int = 6) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """photo, render (= photo content moved by `shift` rows and columns, plus noise), mask."""
    rng = np.random.default_rng(seed)
    pad = 8
    big = _texture(rng, 64, 80, pad)
    photo = big[pad:pad + 64, pad:pad + 80]
    render = big[pad + shift:pad + shift + 64, pad - shift:pad - shift + 80]
    render = np.clip(render + rng.normal(0, noise, render.shape), 0, 1)
    return photo, render, np.ones((64, 80), bool)


def test_tolerant_psnr_forgives_small_shift_only():
    photo, same, mask = _shift_pair(0, 0.02)
    _, moved2, _ = _shift_pair(2, 0.02)
    _, moved5, _ = _shift_pair(5, 0.02)
    # the noise-only PSNR, from scikit-image on the unshifted pair, is what a 2 px move must keep
    ref = peak_signal_noise_ratio(photo, same, data_range=1)
    assert metrics.tolerant_psnr(same, photo, mask) == pytest.approx(ref, abs=0.3)
    assert metrics.tolerant_psnr(moved2, photo, mask) == pytest.approx(ref, abs=0.5)
    assert metrics.psnr(moved2, photo, mask) < ref - 8          # plain PSNR does punish the move
    assert metrics.tolerant_psnr(moved5, photo, mask) < ref - 8  # beyond +-3 px it is not forgiven


def test_tolerant_psnr_radius_zero_is_plain_psnr():
    photo, render, _ = _shift_pair(1, 0.05)
    mask = _disc(64, 80)
    # scikit-image PSNR on the masked pixels: with no shift allowed the two must agree
    ref = peak_signal_noise_ratio(photo[mask], render[mask], data_range=1)
    assert metrics.tolerant_psnr(render, photo, mask, radius=0) == pytest.approx(ref, abs=1e-9)


def test_tolerant_psnr_matches_brute_force_loop():
    """Vectorised shifts against a plain loop over tiles and shifts (same definition, 2 tile sizes)."""
    rng = np.random.default_rng(7)
    photo = _texture(rng, 37, 45)
    render = np.clip(np.roll(photo, (1, -2), (0, 1)) + rng.normal(0, 0.03, photo.shape), 0, 1)
    mask = _disc(37, 45)
    for tile, radius in ((16, 3), (8, 2)):
        tot_e = tot_n = 0.0
        for ty in range(0, 37, tile):
            for tx in range(0, 45, tile):
                own = mask[ty:ty + tile, tx:tx + tile].sum() * 3
                if own == 0:
                    continue
                best = None
                for dy in range(-radius, radius + 1):
                    for dx in range(-radius, radius + 1):
                        e = n = 0.0
                        for y in range(ty, min(ty + tile, 37)):
                            for x in range(tx, min(tx + tile, 45)):
                                yy, xx = y + dy, x + dx
                                if mask[y, x] and 0 <= yy < 37 and 0 <= xx < 45 and mask[yy, xx]:
                                    e += float(np.sum((render[y, x] - photo[yy, xx]) ** 2))
                                    n += 3
                        if n > 0 and n >= 0.5 * own and (best is None or e / n < best[0] / best[1]):
                            best = (e, n)
                tot_e += best[0]
                tot_n += best[1]
        ref = -10 * np.log10(tot_e / tot_n)
        assert metrics.tolerant_psnr(render, photo, mask, tile=tile, radius=radius) == pytest.approx(ref, abs=1e-9)


def test_score_view_keys_and_exposure():
    rng = np.random.default_rng(8)
    photo_lin = srgb_to_linear(_texture(rng, 40, 40))
    render_lin = np.clip(photo_lin * np.array([0.8, 0.9, 1.1]), 0, 1)   # exposure differs only
    mask = _disc(40, 40)
    s = metrics.score_view(render_lin, photo_lin, mask)
    assert set(s) == set(metrics.SCORE_KEYS)
    # plain PSNR on sRGB values, recomputed with scikit-image on the mask pixels
    ref = peak_signal_noise_ratio(linear_to_srgb(photo_lin)[mask], linear_to_srgb(render_lin)[mask], data_range=1)
    assert s["psnr"] == pytest.approx(ref, abs=1e-6)
    assert s["psnr_gaincomp"] > s["psnr"] + 10       # the gain removes the exposure difference
    assert s["psnr_tolerant"] >= s["psnr_gaincomp"] - 1e-9


def test_aggregate_pools_mse():
    rng = np.random.default_rng(9)
    imgs = [(rng.random((10, 10, 3)), rng.random((10, 10, 3)), rng.random((10, 10)) > p) for p in (0.2, 0.7)]
    scores = [{"psnr": metrics.psnr(a, b, m), "ssim": metrics.ssim(a, b, m)} for a, b, m in imgs]
    weights = [int(m.sum()) for _, _, m in imgs]
    agg = metrics.aggregate(scores, weights)
    # pooled MSE = PSNR of all mask pixels of both views taken as one set (scikit-image PSNR)
    a_all = np.concatenate([a[m] for a, _, m in imgs])
    b_all = np.concatenate([b[m] for _, b, m in imgs])
    assert agg["psnr"] == pytest.approx(peak_signal_noise_ratio(a_all, b_all, data_range=1), abs=1e-9)
    assert agg["ssim"] == pytest.approx((scores[0]["ssim"] * weights[0] + scores[1]["ssim"] * weights[1])
                                        / sum(weights), abs=1e-12)


def test_empty_mask_is_refused():
    with pytest.raises(ValueError):
        metrics.psnr(np.zeros((4, 4, 3)), np.zeros((4, 4, 3)), np.zeros((4, 4), bool))
