"""The differentiable SSIM against scikit-image's implementation of Wang et al. (2004)."""

import numpy as np
import torch
from skimage.metrics import structural_similarity

from featuretex.fit.losses import masked_l1, masked_ssim, ssim_map


def _skimage_ssim(a: np.ndarray, b: np.ndarray) -> float:
    # Reference: skimage.metrics.structural_similarity with the settings of Wang et al. (2004)
    return structural_similarity(a, b, data_range=1.0, channel_axis=-1, gaussian_weights=True,
                                 sigma=1.5, use_sample_covariance=False)


def test_ssim_matches_scikit_image():
    rng = np.random.default_rng(0)
    a = rng.random((40, 52, 3)).astype(np.float64)
    a = (a + np.roll(a, 1, 0) + np.roll(a, 1, 1)) / 3          # some spatial structure
    b = np.clip(a + rng.normal(0, 0.08, a.shape), 0, 1)
    ours = ssim_map(torch.from_numpy(a).permute(2, 0, 1)[None].float(),
                    torch.from_numpy(b).permute(2, 0, 1)[None].float()).mean().item()
    assert abs(ours - _skimage_ssim(a, b)) < 1e-4


def test_masked_ssim_full_mask_matches_scikit_image_and_has_gradient():
    rng = np.random.default_rng(1)
    a = rng.random((30, 30, 3))
    b = np.clip(0.7 * a + 0.1, 0, 1)
    x = torch.from_numpy(b).permute(2, 0, 1)[None].float().requires_grad_()
    y = torch.from_numpy(a).permute(2, 0, 1)[None].float()
    s = masked_ssim(x, y, torch.ones(1, 30, 30, dtype=torch.bool))
    assert abs(s.item() - _skimage_ssim(b, a)) < 1e-4
    (1 - s).backward()
    assert x.grad is not None and x.grad.abs().sum() > 0


def test_masked_l1_ignores_pixels_outside_mask():
    x = torch.zeros(1, 3, 4, 4)
    y = torch.ones(1, 3, 4, 4)
    y[..., :2, :] = 0.25
    mask = torch.zeros(1, 4, 4, dtype=torch.bool)
    mask[:, :2] = True
    assert abs(masked_l1(x, y, mask).item() - 0.25) < 1e-7   # arithmetic: only the 0.25 rows count


def _srgb_iec(lin: np.ndarray) -> np.ndarray:
    """IEC 61966-2-1 sRGB encoding, written out here from the standard (float64)."""
    lin = np.clip(lin, 0, 1)
    return np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * lin ** (1 / 2.4) - 0.055)


def test_compiled_loss_matches_scikit_image_and_the_iec_encoding():
    """Full mask, linear values inside [0, 1]: the compiled loss's SSIM equals scikit-image's on
    the IEC 61966-2-1 encoded images, and its L1 the mean absolute difference of those."""
    from featuretex.fit.photoloss import photometric_loss

    rng = np.random.default_rng(3)
    a = rng.random((2, 3, 36, 44))
    a = (a + np.roll(a, 1, 2) + np.roll(a, 1, 3)) / 3
    b = np.clip(a + rng.normal(0, 0.05, a.shape), 0, 1)
    out = photometric_loss(torch.from_numpy(a).float(), torch.from_numpy(b).float(),
                           torch.ones(2, 36, 44, dtype=torch.bool)).numpy()
    ea, eb = _srgb_iec(a), _srgb_iec(b)
    assert abs(out[0] - np.abs(ea - eb).mean()) < 1e-6
    ref = np.mean([_skimage_ssim(ea[i].transpose(1, 2, 0), eb[i].transpose(1, 2, 0)) for i in range(2)])
    assert abs(out[1] - ref) < 1e-4


def test_compiled_loss_and_gradients_equal_the_torch_reference():
    """Against autograd through srgb_encode_leaky + masked_l1 + masked_ssim (the torch reference,
    checked above against scikit-image): values and both images' gradients, with a ragged mask,
    values beyond [0, 1] (the leak) and below the sRGB toe, and an empty mask."""
    from featuretex.fit.losses import srgb_encode_leaky
    from featuretex.fit.photoloss import photometric_loss

    g = torch.Generator().manual_seed(0)
    pred0 = torch.rand(3, 3, 40, 48, generator=g) * 1.2 - 0.1
    pred0[0, 0, :5] = 0.001                                   # the linear toe (12.92 x)
    targ0 = torch.rand(3, 3, 40, 48, generator=g) * 0.9
    mask = torch.rand(3, 40, 48, generator=g) > 0.25
    mask[2] = False                                           # a crop with no object pixel
    outs, grads = [], []
    for compiled in (True, False):
        p, t = pred0.clone().requires_grad_(), targ0.clone().requires_grad_()
        if compiled:
            o = photometric_loss(p, t, mask)
        else:
            ep, et = srgb_encode_leaky(p), srgb_encode_leaky(t)
            o = torch.stack([masked_l1(ep, et, mask), masked_ssim(ep, et, mask)])
        (0.8 * o[0] + 0.2 * (1 - o[1])).backward()
        outs.append(o.detach().numpy())
        grads.append((p.grad.numpy(), t.grad.numpy()))
    np.testing.assert_allclose(outs[0], outs[1], rtol=1e-5, atol=1e-6)
    for ours, ref in zip(*grads):
        assert np.abs(ref).max() > 0
        np.testing.assert_allclose(ours, ref, rtol=1e-4, atol=1e-6 * np.abs(ref).max())
    assert np.all(grads[0][0][2] == 0) and np.all(grads[0][1][2] == 0)
