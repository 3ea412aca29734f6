"""Which pixels each step fits: square crops from the fitted views, and their tensors.

Schedule: views are drawn without replacement from a fresh random permutation each round, so
every fitted view is seen once per ceil(V / batch) steps; a crop is centred on a uniformly drawn
object pixel of its view (so crops never land on empty background).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F

from featuretex.fit.viewdata import PHOTO_MARGIN, ViewData
from featuretex.model.corrections import ViewCorrections
from featuretex.model.scene_model import PixelBatch


@dataclass(frozen=True)
class Crop:
    view: int  # index into the fitted views
    y0: int    # top row, pixels
    x0: int    # left column, pixels


class CropSampler:
    """Seeded crop schedule with a checkpointable state."""

    def __init__(self, views: list[ViewData], crop: int, batch: int, seed: int):
        self.views = views
        self.usable = [i for i, v in enumerate(views) if v.n_centres]
        if not self.usable:
            raise ValueError("no fitted view shows any object pixel")
        self.size = int(min([crop] + [min(v.shape) for v in views]))
        self.batch = int(batch)
        self.rng = np.random.default_rng(seed)
        self.order: list[int] = []

    def next(self) -> list[Crop]:
        crops = []
        for _ in range(self.batch):
            if not self.order:
                self.order = [self.usable[i] for i in self.rng.permutation(len(self.usable))]
            v = self.order.pop(0)
            vd = self.views[v]
            H, W = vd.shape
            cy, cx = vd.centre(int(self.rng.integers(vd.n_centres)))
            S = self.size
            crops.append(Crop(v, int(np.clip(cy - S // 2, 0, H - S)), int(np.clip(cx - S // 2, 0, W - S))))
        return crops

    def state_dict(self) -> dict[str, Any]:
        return {"rng": self.rng.bit_generator.state, "order": list(self.order)}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        self.rng.bit_generator.state = state["rng"]
        self.order = [int(i) for i in state["order"]]


@dataclass
class CropBatch:
    pixels: PixelBatch
    view_idx: torch.Tensor   # (B,) int64 fitted-view indices
    loss_mask: torch.Tensor  # (B, S, S) bool
    px: torch.Tensor         # (B, S, S, 2) float32 absolute pixel coords (x, y)
    views: list[ViewData]    # the B crops' views (their photos are read per crop by warped_targets)


def assemble(views: list[ViewData], crops: list[Crop], size: int, halo: int) -> CropBatch:
    """Stack the crops' tensors. The loss ignores `halo` pixels at each crop edge, where the
    screen-space decoder sees zero padding instead of the neighbouring pixels."""
    S = size
    cover, geo, mask, px, uv, rho = [], [], [], [], [], []
    ar = torch.arange(S, dtype=torch.float32)
    for c in crops:
        vd = views[c.view]
        rows, cols = slice(c.y0, c.y0 + S), slice(c.x0, c.x0 + S)
        cv, u, r, g = vd.crop(rows, cols)
        cover.append(cv)
        uv.append(u)
        rho.append(r)
        geo.append(g)
        m = torch.from_numpy(vd.loss_mask[rows, cols].copy())
        if halo:
            m[:halo], m[-halo:], m[:, :halo], m[:, -halo:] = False, False, False, False
        mask.append(m)
        ys, xs = torch.meshgrid(ar + c.y0, ar + c.x0, indexing="ij")
        px.append(torch.stack([xs, ys], -1))
    geo_hwc = torch.stack([g.permute(1, 2, 0) for g in geo])   # (B, h, w, 12): stacked without a layout change
    pixels = PixelBatch(cover=torch.stack(cover), uv=torch.cat(uv), rho=torch.cat(rho), geo=geo_hwc.permute(0, 3, 1, 2))
    return CropBatch(pixels=pixels, view_idx=torch.tensor([c.view for c in crops]), loss_mask=torch.stack(mask),
                     px=torch.stack(px), views=[views[c.view] for c in crops])


def photo_span(lo: float, hi: float, a: int, b: int, n: int) -> tuple[int, int]:
    """Photo pixels [i0, i1) bilinear samples at coords in [lo, hi] read, on one axis of n pixels:
    at least the crop's [a, b) widened by PHOTO_MARGIN. Beyond PHOTO_MARGIN outside the image the
    edge-extended photo is constant, so the span stops there (the sampler clamps to its border)."""
    m = PHOTO_MARGIN
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return -m, n + m
    return max(-m, min(a - m, math.floor(lo))), min(n + m, max(b + m, math.floor(hi) + 2))


def warped_targets(batch: CropBatch, corrections: ViewCorrections | None, align: bool) -> torch.Tensor:
    """(B, 3, S, S) linear photo values at x + d_v(x) (d = 0 without alignment), bilinear, on the
    edge-extended photo. Each crop reads only the photo window its sample points reach."""
    src = batch.px
    if align and corrections is not None:
        src = src + corrections.displacement(batch.view_idx, batch.px)
    out = []
    S = batch.px.shape[1]
    s = src.detach()
    lo, hi = s.amin(dim=(1, 2)).tolist(), s.amax(dim=(1, 2)).tolist()   # (B, 2) extent of the samples
    for b, vd in enumerate(batch.views):
        H, W = vd.shape
        x0, y0 = int(batch.px[b, 0, 0, 0]), int(batch.px[b, 0, 0, 1])
        c0, c1 = photo_span(lo[b][0], hi[b][0], x0, x0 + S, W)
        r0, r1 = photo_span(lo[b][1], hi[b][1], y0, y0 + S, H)
        photo = vd.photo_window(r0, r1, c0, c1)
        scale = torch.tensor([c1 - c0 - 1, r1 - r0 - 1], dtype=torch.float32)
        g = 2.0 * (src[b] - torch.tensor([c0, r0], dtype=torch.float32)) / scale - 1.0
        out.append(F.grid_sample(photo[None], g[None], mode="bilinear", padding_mode="border",
                                 align_corners=True)[0])
    return torch.stack(out)
