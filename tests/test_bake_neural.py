"""Bake of a fitted model: exact head, reprojected residual, robust combination, held-out scores.

The "models" here are real SceneModels whose parameters are set by hand, so the true texture and
the true screen-space residual are known in closed form; the scene is an exact sphere whose photos
pyrender (an independent OpenGL renderer) made from a known texture.
"""

import math

import numpy as np
import pytest
import torch
from scipy import ndimage
from skimage.transform import downscale_local_mean

from featuretex.bake.neural import (BakeConfig, ResidualSamples, bake_model, compose_texture, gather_samples,
                                    robust_combine, weighted_median)
from featuretex.errors import InputError
from featuretex.fit.render import render_texel_head, residual_renderer
from featuretex.model.corrections import ViewCorrections, grid_shape
from featuretex.model.scene_model import SceneModel
from featuretex.raster.stage import build_gbuffers
from featuretex.raster.uvspace import rasterise_uv
from featuretex.scene.colour import linear_to_srgb, srgb_to_linear
from featuretex.scene.loaded import load_scene
from featuretex.scoring import metrics
from featuretex.scoring.heldout import score_bake
from featuretex.scoring.render import render_texture
from featuretex.texels.visibility import usable_mask

from scenes import smooth_texture, sphere_scene

T = 128


@pytest.fixture(scope="module")
def sphere(tmp_path_factory):
    folder = tmp_path_factory.mktemp("bake_sphere")
    path, truth_srgb = sphere_scene(folder, texture=smooth_texture(T))
    scene = load_scene(path)
    gbuffers, _ = build_gbuffers(scene, folder / "cache", quiet=True)
    texels = rasterise_uv(scene.mesh, T)
    return scene, gbuffers, texels, srgb_to_linear(truth_srgb)


def make_model(tex_lin: np.ndarray, decoder: str = "texel", offset: float | None = None,
               scene=None, colour_gain: float | None = None) -> SceneModel:
    """A SceneModel whose head texture is `tex_lin` (T, T, 3) and, with `offset`, whose screen-space
    decoder outputs that constant in every channel (last layer: weight 0, bias atanh(offset/bound))."""
    corr = None
    if scene is not None:
        fitted = list(scene.manifest.fitted)
        sizes = [(v.camera.width, v.camera.height) for v in fitted]
        corr = ViewCorrections([v.name for v in fitted], sizes, grid_shape(sizes[0][1], sizes[0][0], 40.0))
    m = SceneModel(tex_lin.shape[0], 2, decoder, {}, corr)
    with torch.no_grad():
        m.texture.colour.copy_(torch.from_numpy(tex_lin.astype(np.float32)).reshape(m.texture.colour.shape))
        if offset is not None:
            out = m.decoder.screen.out
            out.weight.zero_()
            out.bias.fill_(math.atanh(offset / m.decoder.screen.bound))
        if colour_gain is not None and corr is not None:
            # every non-reference view gets its own exposure; the bake must not see any of it
            corr.colour_delta.copy_(torch.eye(3) * (colour_gain - 1.0) * torch.linspace(0.5, 1.5, len(corr.names))[:, None, None])
            corr.colour_bias.fill_(0.02)
    return m.eval()


def bake(scene, gbuffers, texels, model: SceneModel, cfg: BakeConfig | None = None):
    """The bake as the pipeline calls it: the model's head texture and its residual renderer."""
    return bake_model(scene, gbuffers, texels, render_texel_head(model, texels.size),
                      residual_renderer(model, scene, gbuffers), cfg)


def test_bake_returns_head_exactly_on_seen_texels(sphere):
    scene, gbuffers, texels, truth = sphere
    res = bake(scene, gbuffers, texels, make_model(truth))
    assert res.seen.sum() > 0.5 * texels.valid.sum()
    # reference: the known texture the model's head was set to (identity head, zero residual)
    assert np.array_equal(res.texture_lin[res.seen], truth[res.seen])
    assert np.abs(res.residual_lin).max() == 0.0
    # gutter: off-surface texels next to an island copy the nearest kept texel (scipy's EDT)
    support = ndimage.binary_dilation(texels.valid, np.ones((3, 3), bool))
    dist, (ri, ci) = ndimage.distance_transform_edt(~support, return_indices=True)
    ring = (~support) & (dist <= 8)
    assert ring.any() and np.array_equal(res.texture_lin[ring], truth[ri[ring], ci[ring]])
    # the baked texture rendered at held-out views matches pyrender's photos of the true texture
    # away from silhouettes, where MSAA blends in the background (pyrender filters sRGB bytes, we
    # filter linear values; measured 55 dB, while a 3 x 3 box blur of the render already drops to 46)
    for v in scene.manifest.heldout:
        render, photo, mask = _render_and_photo(scene, gbuffers, res.texture_lin, v)
        inner = ndimage.binary_erosion(mask, iterations=2)
        assert metrics.psnr(linear_to_srgb(render), linear_to_srgb(photo), inner) >= 50.0
    scores = score_bake(scene, gbuffers, res.texture_lin)
    assert scores["bake_gap_db"] is None


def test_bake_at_another_size_is_the_area_average(sphere):
    scene, gbuffers, _, truth = sphere
    texels = rasterise_uv(scene.mesh, T // 2)
    res = bake(scene, gbuffers, texels, make_model(truth))
    # reference: scikit-image's 2 x 2 block mean (the head texture at half size is mip level 1)
    ref = downscale_local_mean(truth, (2, 2, 1))
    assert np.allclose(res.texture_lin[res.seen], ref[res.seen], atol=1e-6)


def test_bake_recovers_constant_residual_without_view_exposure(sphere):
    scene, gbuffers, texels, truth = sphere
    base = 0.1 + 0.7 * truth                      # room for the offset in [0, 1]
    offset = 0.05
    model = make_model(base, "texel-screen", offset=offset, scene=scene, colour_gain=1.6)
    res = bake(scene, gbuffers, texels, model)
    # reference: the analytic value head + offset (the decoder adds `offset` everywhere)
    assert res.seen.sum() > 0.5 * texels.valid.sum()
    assert np.allclose(res.texture_lin[res.seen], base[res.seen] + offset, atol=2e-6)
    # unseen surface texels get the pull-push fill of the residual: the same constant
    unseen = texels.valid & ~res.seen
    assert unseen.any() and np.allclose(res.texture_lin[unseen], base[unseen] + offset, atol=2e-6)
    # switching the residual off leaves the exact head
    off = bake(scene, gbuffers, texels, model, BakeConfig(residual=False))
    assert np.array_equal(off.texture_lin[off.seen], base[off.seen])


def _constant_residuals(scene, values: dict[str, float]):
    def residual_of(view):
        return np.full((view.camera.height, view.camera.width, 3), values[view.name], np.float32)
    return residual_of


def test_robust_weighting_rejects_one_outlier_view(sphere):
    scene, gbuffers, texels, _ = sphere
    fitted = list(scene.manifest.fitted)
    inlier, outlier, bad = 0.03, 0.30, 2
    vals = {v.name: inlier for v in fitted}
    vals[fitted[bad].name] = outlier
    cfg = BakeConfig()
    s = gather_samples(scene, gbuffers, texels, _constant_residuals(scene, vals), cfg)
    n = T * T
    w_all = np.bincount(s.idx, s.weight, n)
    w_bad = np.bincount(s.idx, s.weight * (s.view == bad), n)
    views = np.bincount(s.idx, minlength=n)
    # texels the outlier sees among >= 3 views without holding the majority of the weight
    test = (w_bad > 0) & (views >= 3) & (w_bad < 0.5 * w_all)
    assert test.sum() > 200
    est, _ = robust_combine(s, n, cfg)
    assert np.abs(est[test] - inlier).max() < 1e-3
    # the plain weighted mean is dragged: analytic (inlier W_in + outlier W_out) / W
    mean, _ = robust_combine(s, n, BakeConfig(robust="mean"))
    analytic = (inlier * (w_all - w_bad) + outlier * w_bad) / np.maximum(w_all, 1e-300)
    assert np.allclose(mean[test], analytic[test, None], atol=1e-6)
    assert np.abs(mean[test] - inlier).max() > 0.05
    # and the composed texture carries the robust residual over a zero head
    out = compose_texture(texels, np.zeros((T, T, 3), np.float32), s, cfg)
    assert np.abs(out.texture_lin.reshape(-1, 3)[test] - inlier).max() < 1e-3


def test_weighted_median_matches_numpy_median():
    rng = np.random.default_rng(3)
    n = 200
    idx = rng.integers(0, n, 3000)
    val = rng.normal(size=(3000, 3))
    w = rng.integers(1, 4, 3000).astype(np.float64)
    got = weighted_median(idx, val, w, n)
    for g in range(n):
        sel = idx == g
        reps = np.repeat(val[sel], w[sel].astype(int), axis=0)
        if len(reps) == 0:
            assert np.all(got[g] == 0)
        elif len(reps) % 2 == 1:   # reference: numpy's median of the values repeated by weight
            assert np.allclose(got[g], np.median(reps, axis=0))
        else:                      # even total: the lower of the two middle values
            assert np.allclose(got[g], np.sort(reps, axis=0)[len(reps) // 2 - 1])


def test_bad_robust_mode_is_an_input_error():
    s = ResidualSamples(np.zeros(1, np.int64), np.zeros((1, 3), np.float32), np.ones(1), np.zeros(1, np.int32))
    with pytest.raises(InputError, match="bake.robust"):
        robust_combine(s, 1, BakeConfig(robust="trimmed"))


def test_score_bake_gap_is_neural_minus_baked(sphere):
    scene, gbuffers, texels, truth = sphere
    res = bake(scene, gbuffers, texels, make_model(truth))
    blurred = ndimage.uniform_filter(res.texture_lin, size=(5, 5, 1))
    neural = score_bake(scene, gbuffers, res.texture_lin)["baked"]
    out = score_bake(scene, gbuffers, blurred, neural)
    assert out["bake_gap_db"] == pytest.approx(neural["psnr_tolerant"] - out["baked"]["psnr_tolerant"])
    assert out["bake_gap_db"] > 0.5            # a blurred texture loses to the sharp one


def _render_and_photo(scene, gbuffers, tex, view):
    gb = gbuffers[view.name]
    return render_texture(gb, scene.mesh, tex), scene.photo(view), usable_mask(scene, view, gb)
