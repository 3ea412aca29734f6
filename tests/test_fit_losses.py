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
