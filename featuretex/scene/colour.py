"""sRGB transfer function (IEC 61966-2-1) for numpy arrays and torch tensors.

Photos are decoded to linear light once; fitting and averaging happen in linear light;
exported textures and metrics use sRGB-encoded values.
"""

from __future__ import annotations

import numpy as np

_A = 0.055
_THRESH_ENC = 0.04045      # on encoded values
_THRESH_LIN = 0.0031308    # on linear values


def srgb_to_linear(x: np.ndarray) -> np.ndarray:
    """Decode sRGB values in [0,1] to linear light in [0,1] (float32)."""
    x = np.clip(np.asarray(x, dtype=np.float32), 0.0, 1.0)
    return np.where(x <= _THRESH_ENC, x / 12.92, ((x + _A) / (1 + _A)) ** 2.4).astype(np.float32)


def linear_to_srgb(x: np.ndarray) -> np.ndarray:
    """Encode linear light in [0,1] to sRGB values in [0,1] (float32); input is clipped."""
    x = np.clip(np.asarray(x, dtype=np.float32), 0.0, 1.0)
    return np.where(x <= _THRESH_LIN, 12.92 * x, (1 + _A) * np.power(x, 1 / 2.4) - _A).astype(np.float32)


def linear_to_srgb_torch(x):
    """Differentiable sRGB encoding for torch tensors (clamped to [0,1])."""
    import torch

    x = x.clamp(0.0, 1.0)
    return torch.where(x <= _THRESH_LIN, 12.92 * x, (1 + _A) * x.clamp_min(_THRESH_LIN) ** (1 / 2.4) - _A)


def to_uint8(srgb: np.ndarray) -> np.ndarray:
    """Quantise sRGB values in [0,1] to uint8 with rounding."""
    return np.clip(np.rint(np.asarray(srgb) * 255.0), 0, 255).astype(np.uint8)
