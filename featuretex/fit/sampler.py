"""Which pixels each step fits: square crops from the fitted views, and their tensors.

Schedule: views are drawn without replacement from a fresh random permutation each round, so
every fitted view is seen once per ceil(V / batch) steps; a crop is centred on a uniformly drawn
object pixel of its view (so crops never land on empty background).
"""

from __future__ import annotations

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
        self.usable = [i for i, v in enumerate(views) if v.valid_flat is not None and len(v.valid_flat)]
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
            flat = vd.valid_flat
            cy, cx = divmod(int(flat[self.rng.integers(len(flat))]), W)
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
    photos: list[torch.Tensor]  # B padded photos (3, H + 2m, W + 2m)


def assemble(views: list[ViewData], crops: list[Crop], size: int, halo: int) -> CropBatch:
    """Stack the crops' tensors. The loss ignores `halo` pixels at each crop edge, where the
    screen-space decoder sees zero padding instead of the neighbouring pixels."""
    S = size
    cover, geo, mask, px, uv, rho, photos = [], [], [], [], [], [], []
    ar = torch.arange(S, dtype=torch.float32)
    for c in crops:
        vd = views[c.view]
        sl = (slice(c.y0, c.y0 + S), slice(c.x0, c.x0 + S))
        cv = vd.cover[sl]
        cover.append(cv)
        uv.append(vd.uv[sl][cv])
        rho.append(vd.rho[sl][cv])
        geo.append(vd.geo[:, sl[0], sl[1]])
        m = vd.loss_mask[sl].clone()
        if halo:
            m[:halo], m[-halo:], m[:, :halo], m[:, -halo:] = False, False, False, False
        mask.append(m)
        ys, xs = torch.meshgrid(ar + c.y0, ar + c.x0, indexing="ij")
        px.append(torch.stack([xs, ys], -1))
        photos.append(vd.photo)
    pixels = PixelBatch(cover=torch.stack(cover), uv=torch.cat(uv), rho=torch.cat(rho), geo=torch.stack(geo))
    return CropBatch(pixels=pixels, view_idx=torch.tensor([c.view for c in crops]), loss_mask=torch.stack(mask),
                     px=torch.stack(px), photos=photos)


def warped_targets(batch: CropBatch, corrections: ViewCorrections | None, align: bool) -> torch.Tensor:
    """(B, 3, S, S) linear photo values at x + d_v(x) (d = 0 without alignment), bilinear."""
    src = batch.px
    if align and corrections is not None:
        src = src + corrections.displacement(batch.view_idx, batch.px)
    out = []
    m = PHOTO_MARGIN
    for b, photo in enumerate(batch.photos):
        Hp, Wp = photo.shape[1:]
        g = 2.0 * (src[b] + m) / torch.tensor([Wp - 1, Hp - 1], dtype=torch.float32) - 1.0
        out.append(F.grid_sample(photo[None], g[None], mode="bilinear", padding_mode="border",
                                 align_corners=True)[0])
    return torch.stack(out)
