"""Feature-texture sampling checked against scipy's bilinear interpolation and a supersampled mean."""

import numpy as np
import torch
from scipy import ndimage

from featuretex.model.texture import build_pyramid, mip_taps, sample_layer, sample_taps


class _Layer:
    """A random (T, T, C) layer and its sampler."""

    def __init__(self, T: int, C: int, seed: int = 0):
        self.T, self.C = T, C
        self.flat = torch.from_numpy(np.random.default_rng(seed).random((T * T, C), dtype=np.float32))
        self.flat.requires_grad_()

    @property
    def values(self) -> torch.Tensor:
        return self.flat.view(self.T, self.T, self.C)

    def sample(self, uv, rho):
        return sample_layer(self.flat, self.T, uv, rho)


def _texture(T: int, C: int, seed: int = 0) -> _Layer:
    return _Layer(T, C, seed)


def test_level0_matches_scipy_map_coordinates():
    """At level 0 the sampler is bilinear with edge clamping.

    Reference: scipy.ndimage.map_coordinates(order=1, mode='nearest') on each channel, with texel
    (row, col) = ((1 - v) T - 0.5, u T - 0.5) (v up, texel centres at half-integers in uv * T).
    """
    T, C = 37, 5
    tex = _texture(T, C)
    rng = np.random.default_rng(1)
    uv = rng.uniform(-0.05, 1.05, (2000, 2)).astype(np.float32)  # includes edge-clamped lookups
    rho = np.full(2000, 0.3 / T, np.float32)                      # footprint < 1 texel: level 0
    got = tex.sample(torch.from_numpy(uv), torch.from_numpy(rho)).detach().numpy()
    row = (1.0 - uv[:, 1].astype(np.float64)) * T - 0.5
    col = uv[:, 0].astype(np.float64) * T - 0.5
    vals = tex.values.detach().numpy().astype(np.float64)
    ref = np.stack([ndimage.map_coordinates(vals[..., c], [row, col], order=1, mode="nearest")
                    for c in range(C)], axis=1)
    np.testing.assert_allclose(got, ref, atol=2e-6)


def test_pyramid_levels_are_box_averages():
    """Level k is the mean of 2^k x 2^k blocks of level 0 (box mipmap; computed here with numpy)."""
    T, C = 16, 3
    tex = _texture(T, C, seed=2)
    table = build_pyramid(tex.values.detach(), 5).numpy()
    vals = tex.values.detach().numpy()
    base = 0
    for k in range(5):
        s = T >> k
        ref = vals.reshape(s, T // s, s, T // s, C).mean(axis=(1, 3)).reshape(-1, C)
        np.testing.assert_allclose(table[base:base + s * s], ref, atol=1e-6)
        base += s * s


def test_minified_lookup_matches_supersampled_average():
    """A pixel covering 4 x 4 texels (lambda = 2) reads level 2, i.e. the box average of the texels
    under its footprint: on a texel-aligned footprint, the plain numpy mean of those 16 texels."""
    T, C = 32, 2
    tex = _texture(T, C, seed=3)
    # centre of the 4x4 block at rows 8..11, cols 12..15 -> uv of the block centre
    u, v = 14.0 / T, 1.0 - 10.0 / T
    got = tex.sample(torch.tensor([[u, v]]), torch.tensor([4.0 / T])).detach().numpy()[0]
    ref = tex.values.detach().numpy()[8:12, 12:16].reshape(-1, C).mean(0)
    np.testing.assert_allclose(got, ref, atol=1e-6)


def test_trilinear_blend_between_levels():
    """lambda = 1.5 blends levels 1 and 2 half and half (OpenGL LINEAR_MIPMAP_LINEAR; from memory)."""
    T, C = 16, 1
    tex = _texture(T, C, seed=4)
    uv = torch.tensor([[0.3, 0.6]])
    rho15 = torch.tensor([2 ** 1.5 / T])
    got = tex.sample(uv, rho15).item()
    table = build_pyramid(tex.values.detach(), 3)
    l1 = sample_taps(table, mip_taps(uv, torch.tensor([2.0 / T]), T)).item()
    l2 = sample_taps(table, mip_taps(uv, torch.tensor([4.0 / T]), T)).item()
    assert abs(got - 0.5 * (l1 + l2)) < 1e-6
    assert abs(l1 - l2) > 1e-4  # the levels differ, so the blend is a real check


def test_gradients_reach_level0():
    tex = _texture(8, 2, seed=5)
    out = tex.sample(torch.tensor([[0.5, 0.5], [0.1, 0.9]]), torch.tensor([8.0 / 8, 0.1 / 8]))
    out.sum().backward()
    g = tex.flat.grad.reshape(8, 8, 2).numpy()
    # the fully minified pixel (rho * T = 8 -> level 3 = whole texture) spreads 1/64 to every texel
    assert np.all(g[..., 0] >= 1.0 / 64 - 1e-6)
    np.testing.assert_allclose(g.sum(axis=(0, 1)), [2.0, 2.0], atol=1e-5)  # weights sum to 1 per pixel


def _reference_pyramid(level0: torch.Tensor, levels: int) -> torch.Tensor:
    """Levels by torch's avg_pool2d (ceil_mode, count_include_pad=False), concatenated."""
    T, _, C = level0.shape
    rows, cur = [level0.reshape(T * T, C)], level0.permute(2, 0, 1)[None]
    for _ in range(1, levels):
        cur = torch.nn.functional.avg_pool2d(cur, 2, ceil_mode=True, count_include_pad=False)
        rows.append(cur[0].permute(1, 2, 0).reshape(-1, C))
    return torch.cat(rows, 0)


def test_odd_sized_pyramid_matches_avg_pool2d():
    """Odd sizes: the last row/column averages alone, as torch's avg_pool2d with ceil_mode does."""
    T = 23
    level0 = torch.from_numpy(np.random.default_rng(7).random((T, T, 2), dtype=np.float32))
    np.testing.assert_allclose(build_pyramid(level0, 5).numpy(), _reference_pyramid(level0, 5).numpy(), atol=1e-6)


def _ours_and_reference(table, T, uv, rho, up):
    """([ours, reference] samples, [ours, reference] gradients of sum(samples * up)) of a (T*T, 3)
    layer: sample_layer against autograd through F.embedding_bag over an avg_pool2d pyramid."""
    taps = mip_taps(uv, rho, T)
    outs, grads = [], []
    for ours in (True, False):
        leaf = table.clone().requires_grad_()
        if ours:
            out = sample_layer(leaf, T, uv, rho)
        else:
            out = torch.nn.functional.embedding_bag(taps.index, _reference_pyramid(leaf.view(T, T, 3), taps.levels),
                                                    taps.offsets, mode="sum", per_sample_weights=taps.weight)
        (out * up).sum().backward()
        outs.append(out.detach().numpy())
        grads.append(leaf.grad.numpy())
    return outs, grads


def test_sampling_and_gradient_match_torch_autograd():
    """The layer sampler (compiled per-pixel kernels, coarse levels built apart from level 0,
    hand-written backward) equals torch autograd through an avg_pool2d pyramid and
    F.embedding_bag (the reference), values and gradients: even and odd texture sizes, blended
    levels, edge-clamped lookups, magnified-only batches (level 0 alone), footprints beyond the
    coarsest level, and no footprint at all (plain bilinear)."""
    rng = np.random.default_rng(6)
    cases = [(16, (0.2, 6.0), (0.0, 1.0)), (23, (0.2, 6.0), (-0.05, 1.05)), (23, (0.01, 0.9), (0.0, 1.0)),
             (16, (8.0, 40.0), (0.0, 1.0)), (16, None, (-0.05, 1.05))]
    for T, rho_range, uv_range in cases:
        table = torch.from_numpy(rng.random((T * T, 3), dtype=np.float32))
        uv = torch.from_numpy(rng.uniform(*uv_range, (500, 2)).astype(np.float32))
        rho = None if rho_range is None else torch.from_numpy(rng.uniform(*rho_range, 500).astype(np.float32) / T)
        up = torch.from_numpy(rng.normal(size=(500, 3)).astype(np.float32))
        assert mip_taps(uv, rho, T).levels >= (3 if rho_range == (0.2, 6.0) else 1)
        outs, grads = _ours_and_reference(table, T, uv, rho, up)
        np.testing.assert_allclose(outs[0], outs[1], rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(grads[0], grads[1], rtol=1e-5, atol=1e-6)


def test_parallel_scatter_is_bit_identical_to_one_thread_and_matches_the_reference():
    """A layer large enough for the banded parallel backward (>= 2^20 values): its gradient equals
    the embedding_bag/avg_pool2d reference, and the scatter gives the same bits with 1, 2 or 3
    bands (each texel adds its terms in pixel order)."""
    from featuretex.model import mipkernel

    rng = np.random.default_rng(11)
    T = 600                                                   # 600^2 x 3 = 1.08M values
    table = torch.from_numpy(rng.random((T * T, 3), dtype=np.float32))
    uv = torch.from_numpy(rng.uniform(0, 1, (3000, 2)).astype(np.float32))
    rho = torch.from_numpy(rng.uniform(0.3, 5.0, 3000).astype(np.float32) / T)
    up = torch.from_numpy(rng.normal(size=(3000, 3)).astype(np.float32))
    _, grads = _ours_and_reference(table, T, uv, rho, up)
    np.testing.assert_allclose(grads[0], grads[1], rtol=1e-5, atol=1e-6)
    idx = rng.integers(0, 5000, (3000, 8)).astype(np.int64)  # colliding rows: order matters
    wts = rng.random((3000, 8)).astype(np.float32)
    outs = []
    for parts in (1, 2, 3):
        acc = np.zeros((5000, 3), np.float32)
        mipkernel.mip_scatter(up.numpy(), idx, wts, acc, 0, parts)
        outs.append(acc)
    assert np.array_equal(outs[0], outs[1]) and np.array_equal(outs[0], outs[2])
