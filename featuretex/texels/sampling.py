"""Texture lookup at UVs (bilinear, texel-centre convention) and image lookup at pixel coords."""

from __future__ import annotations

import numpy as np


def sample_texture(tex: np.ndarray, uv: np.ndarray) -> np.ndarray:
    """Bilinear lookup of `tex` (T, T, C) at `uv` (..., 2) (v up) -> (..., C) float32, edge-clamped.

    Texel (i, j) has its centre at u = (j + 0.5) / T, v = 1 - (i + 0.5) / T.
    """
    T = tex.shape[0]
    col = uv[..., 0] * tex.shape[1] - 0.5
    row = (1.0 - uv[..., 1]) * T - 0.5
    return sample_image(tex, np.stack([col, row], axis=-1))


def sample_image(img: np.ndarray, xy: np.ndarray) -> np.ndarray:
    """Bilinear lookup of `img` (H, W, C) at pixel coords `xy` (..., 2) = (x right, y down), pixel
    centres at integers, edge-clamped -> (..., C) float32."""
    H, W = img.shape[:2]
    x = np.clip(xy[..., 0], 0, W - 1)
    y = np.clip(xy[..., 1], 0, H - 1)
    x0 = np.minimum(np.floor(x).astype(np.int64), W - 2 if W > 1 else 0)
    y0 = np.minimum(np.floor(y).astype(np.int64), H - 2 if H > 1 else 0)
    x1 = np.minimum(x0 + 1, W - 1)
    y1 = np.minimum(y0 + 1, H - 1)
    fx = (x - x0)[..., None].astype(np.float32)
    fy = (y - y0)[..., None].astype(np.float32)
    top = img[y0, x0] * (1 - fx) + img[y0, x1] * fx
    bot = img[y1, x0] * (1 - fx) + img[y1, x1] * fx
    return (top * (1 - fy) + bot * fy).astype(np.float32)
