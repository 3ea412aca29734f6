"""Per-view corrections fitted with the texture: colour (exposure / white balance) and alignment.

Colour: affine in linear light, photo ~ M_v render + b_v, with M_v = I + dM_v. It absorbs each
photo's own exposure and white balance so the texture holds one consistent albedo; a reference
view is held at the identity (otherwise texture brightness and every view's gain trade freely).

Alignment: a coarse per-view field d_v (h x w nodes over the image, in pixels, upsampled
bilinearly) that warps the PHOTO onto the render, target(x) = photo(x + d_v(x)). It absorbs small
calibration errors and the misplacement broken geometry causes, so misregistered photos stop
ghosting the texture; the diagnosis reads its magnitudes.
"""

from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn


def grid_shape(height: int, width: int, cell_px: float) -> tuple[int, int]:
    """Nodes (rows, cols) of an alignment grid with cells of about `cell_px` pixels (>= 2 each)."""
    return max(2, round(height / cell_px) + 1), max(2, round(width / cell_px) + 1)


class ViewCorrections(nn.Module):
    """Corrections of V fitted views, all of one grid shape (h, w)."""

    def __init__(self, names: list[str], image_sizes: list[tuple[int, int]], grid_hw: tuple[int, int],
                 reference: int = 0):
        super().__init__()
        V = len(names)
        self.names = list(names)
        self.reference = int(reference)
        self.colour_delta = nn.Parameter(torch.zeros(V, 3, 3))     # M_v - I
        self.colour_bias = nn.Parameter(torch.zeros(V, 3))         # b_v, linear light
        self.align = nn.Parameter(torch.zeros(V, 2, *grid_hw))     # (dx, dy) px at the nodes
        free = torch.ones(V)
        if V:
            free[self.reference] = 0.0
        self.register_buffer("free", free)                         # 0 = held at the identity
        self.register_buffer("sizes", torch.tensor(image_sizes, dtype=torch.float32).reshape(V, 2))  # (W, H)

    def colour(self, idx: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """(B, 3, 3) matrices and (B, 3) biases of views `idx` (B,)."""
        f = self.free[idx][:, None, None]
        return torch.eye(3) + f * self.colour_delta[idx], f[:, 0] * self.colour_bias[idx]

    def apply_colour(self, render: torch.Tensor, idx: torch.Tensor) -> torch.Tensor:
        """(B, 3, h, w) linear render -> the same with each view's exposure applied."""
        M, b = self.colour(idx)
        return torch.einsum("bij,bjhw->bihw", M, render) + b[:, :, None, None]

    def displacement(self, idx: torch.Tensor, px: torch.Tensor) -> torch.Tensor:
        """(B, h, w, 2) displacement (dx, dy) px at pixel coords `px` (B, h, w, 2) of views `idx`."""
        size = self.sizes[idx]                                      # (B, 2) = (W, H)
        g = 2.0 * px / (size - 1).clamp_min(1)[:, None, None, :] - 1.0   # node grid spans pixel centres
        d = F.grid_sample(self.align[idx], g, mode="bilinear", padding_mode="border", align_corners=True)
        return d.permute(0, 2, 3, 1)

    def regulariser(self) -> dict[str, torch.Tensor]:
        """Penalties (means over views): colour distance to identity, field magnitude, roughness.

        Units: colour terms are squared linear-light values; field terms are squared pixels.
        """
        f = self.free
        colour = ((self.colour_delta ** 2).sum((1, 2)) + (self.colour_bias ** 2).sum(1)) * f
        a = self.align
        mag = (a ** 2).sum(1).mean((1, 2))
        smooth = ((a[:, :, 1:] - a[:, :, :-1]) ** 2).sum(1).mean((1, 2)) \
            + ((a[:, :, :, 1:] - a[:, :, :, :-1]) ** 2).sum(1).mean((1, 2))
        return {"colour": colour.mean(), "align_mag": mag.mean(), "align_smooth": smooth.mean()}

    @torch.no_grad()
    def to_numpy(self) -> dict[str, np.ndarray]:
        """Arrays per fitted view: colour_matrix (V, 3, 3), colour_bias (V, 3), alignment (V, h, w, 2) px."""
        idx = torch.arange(len(self.names))
        M, b = self.colour(idx)
        return {"colour_matrix": M.numpy().astype(np.float32), "colour_bias": b.numpy().astype(np.float32),
                "alignment_px": self.align.permute(0, 2, 3, 1).numpy().astype(np.float32)}

    @torch.no_grad()
    def full_field(self, v: int, height: int, width: int) -> np.ndarray:
        """(H, W, 2) float32 displacement (dx, dy) px of view index v at every pixel."""
        ys, xs = torch.meshgrid(torch.arange(height, dtype=torch.float32),
                                torch.arange(width, dtype=torch.float32), indexing="ij")
        px = torch.stack([xs, ys], -1)[None]
        return self.displacement(torch.tensor([v]), px)[0].numpy()
