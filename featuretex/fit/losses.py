"""Photometric losses on sRGB-encoded values: masked L1 and a differentiable SSIM.

SSIM follows Wang et al. (2004): Gaussian window sigma = 1.5 truncated at 3.5 sigma (11 taps,
as scipy.ndimage.gaussian_filter does), K1 = 0.01, K2 = 0.03, population covariances. The map is
computed on the 'valid' part only (windows fully inside the tile), which equals what
scikit-image averages after cropping its border.
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F

SSIM_SIGMA = 1.5
SSIM_TRUNCATE = 3.5
SSIM_K1, SSIM_K2 = 0.01, 0.03


def gaussian_kernel(sigma: float = SSIM_SIGMA, truncate: float = SSIM_TRUNCATE) -> torch.Tensor:
    """(2r+1,) float32 normalised Gaussian taps, r = int(truncate * sigma + 0.5)."""
    r = int(truncate * sigma + 0.5)
    x = torch.arange(-r, r + 1, dtype=torch.float64)
    k = torch.exp(-0.5 * (x / sigma) ** 2)
    return (k / k.sum()).float()


def _blur_valid(x: torch.Tensor, k: torch.Tensor) -> torch.Tensor:
    """Separable 'valid' Gaussian filter of (B, C, h, w) -> (B, C, h - 2r, w - 2r).

    Run on channels-last memory: torch's depthwise convolutions are faster in that layout on the
    CPU."""
    C = x.shape[1]
    x = x.contiguous(memory_format=torch.channels_last)
    kx = k.view(1, 1, 1, -1).expand(C, 1, 1, -1)
    ky = k.view(1, 1, -1, 1).expand(C, 1, -1, 1)
    return F.conv2d(F.conv2d(x, kx, groups=C), ky, groups=C)


def ssim_map(x: torch.Tensor, y: torch.Tensor, data_range: float = 1.0) -> torch.Tensor:
    """(B, C, h - 10, w - 10) SSIM of images x, y (B, C, h, w), per channel."""
    k = gaussian_kernel()
    c1, c2 = (SSIM_K1 * data_range) ** 2, (SSIM_K2 * data_range) ** 2
    B, C = x.shape[:2]
    stats = _blur_valid(torch.cat([x, y, x * x, y * y, x * y], 1), k)
    mx, my, mxx, myy, mxy = stats.split(C, dim=1)
    vx, vy, cxy = mxx - mx * mx, myy - my * my, mxy - mx * my
    return ((2 * mx * my + c1) * (2 * cxy + c2)) / ((mx * mx + my * my + c1) * (vx + vy + c2))


def ssim_border() -> int:
    """Pixels each side that the valid SSIM map loses."""
    return int(SSIM_TRUNCATE * SSIM_SIGMA + 0.5)


def masked_ssim(x: torch.Tensor, y: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Mean SSIM over channels and the pixels of `mask` (B, h, w) bool.

    Both images are set to 0 outside the mask first, so windows that straddle the object's edge
    compare object pixels only against the same (empty) background.
    """
    m = mask[:, None].to(x.dtype)
    s = ssim_map(x * m, y * m)
    r = ssim_border()
    mc = m[:, :, r:-r, r:-r] if r else m
    return (s * mc).sum() / (mc.sum() * x.shape[1]).clamp_min(1.0)


def masked_l1(x: torch.Tensor, y: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Mean |x - y| over channels and mask pixels; x, y (B, C, h, w), mask (B, h, w) bool."""
    m = mask[:, None].to(x.dtype)
    return ((x - y).abs() * m).sum() / (m.sum() * x.shape[1]).clamp_min(1.0)


def psnr(mse: float) -> float:
    """PSNR in dB of a mean squared error on [0, 1] values."""
    return 10.0 * math.log10(1.0 / max(mse, 1e-12))


def srgb_encode_leaky(x: torch.Tensor) -> torch.Tensor:
    """sRGB encoding (IEC 61966-2-1) of linear `x`, continued with slope 1 outside [0, 1] so values
    that overshoot still get a gradient back into range (a hard clamp would freeze them)."""
    from featuretex.scene.colour import linear_to_srgb_torch

    c = x.clamp(0.0, 1.0)
    return linear_to_srgb_torch(c) + (x - c)
