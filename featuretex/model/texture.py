"""The learned feature texture and its mip-aware (trilinear) sampling at G-buffer UVs.

Layout: the texture is a (T, T, C) parameter, row 0 = top of the image (v = 1), so level 0 is
already the flat (T*T, C) table of the pyramid. Coarser levels are 2x2 box averages (built each
step, so gradients reach level 0). A pixel at level of detail lambda reads four texels of level
floor(lambda) and four of the next level, blended linearly (trilinear filtering); magnified
pixels (lambda <= 0) read four texels of level 0 (bilinear).

Two implementations of the same filter: `mip_taps` + `sample_taps` build explicit tap tables and
gather with `embedding_bag` (plain torch; the reference the tests check), and `sample_layer`,
which the model uses, runs compiled per-pixel kernels (featuretex.model.mipkernel), faster
forward + backward. Neither uses `grid_sample`: its CPU backward is slower than embedding_bag's
for many-channel textures, and it needs pyramid padding. Texel coordinates follow the convention of featuretex.scene.mesh: texel
(i, j) has its centre at u = (j + 0.5) / T, v = 1 - (i + 0.5) / T; lookups are clamped to the edge.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.autograd.function import once_differentiable

from featuretex.compiled import match_torch_threads
from featuretex.model import mipkernel


@dataclass
class MipTaps:
    """Texel taps of N pixels into a pyramid table: `F.embedding_bag(index, table, offsets, ...)`."""

    index: torch.Tensor    # (M,) int64 row of the concatenated pyramid table
    weight: torch.Tensor   # (M,) float32 filter weights, summing to 1 per pixel
    offsets: torch.Tensor  # (N,) int64 start of each pixel's taps in `index`
    levels: int            # pyramid levels the taps reach (1 = level 0 only)


def level_sizes(size: int, levels: int) -> list[int]:
    """Edge length of each pyramid level (ceil halving, so odd sizes work too)."""
    out = [size]
    while len(out) < levels:
        out.append(max(1, (out[-1] + 1) // 2))
    return out


def max_levels(size: int) -> int:
    """Levels down to a 1 x 1 texture."""
    return int(math.ceil(math.log2(max(size, 1)))) + 1


def level_of_detail(rho: torch.Tensor, size: int) -> torch.Tensor:
    """(N,) mip level lambda = log2(rho * T) from footprints rho (uv units per pixel); -inf for rho=0."""
    return torch.log2(rho.clamp_min(1e-12) * size)


def _bilinear_taps(uv: torch.Tensor, size: torch.Tensor, base: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """(N, 4) table rows and (N, 4) weights of bilinear lookups; each pixel n reads the level of
    edge size[n] (int64) whose rows start at base[n]."""
    sz = size.double()
    col = uv[:, 0].double() * sz - 0.5
    row = (1.0 - uv[:, 1].double()) * sz - 0.5
    c0, r0 = torch.floor(col), torch.floor(row)
    fc, fr = (col - c0).float(), (row - r0).float()
    top = size - 1
    c0, r0 = c0.long(), r0.long()
    c1, r1 = torch.minimum((c0 + 1).clamp_min(0), top), torch.minimum((r0 + 1).clamp_min(0), top)
    c0, r0 = torch.minimum(c0.clamp_min(0), top), torch.minimum(r0.clamp_min(0), top)
    idx = torch.stack([r0 * size + c0, r0 * size + c1, r1 * size + c0, r1 * size + c1], dim=1) + base[:, None]
    w = torch.stack([(1 - fc) * (1 - fr), fc * (1 - fr), (1 - fc) * fr, fc * fr], dim=1)
    return idx, w


def mip_taps(uv: torch.Tensor, rho: torch.Tensor | None, size: int, max_level: int | None = None) -> MipTaps:
    """Trilinear taps for pixels with texture coords `uv` (N, 2) (v up) and footprints `rho` (N,).

    rho = None (or all footprints <= 1 texel) gives plain bilinear sampling of level 0. Pixels
    that blend two levels get 8 taps, the others 4.
    """
    n = uv.shape[0]
    top = max_levels(size) - 1 if max_level is None else min(max_level, max_levels(size) - 1)
    lam = torch.zeros(n) if rho is None else level_of_detail(rho, size).clamp(0.0, float(top))
    l0 = torch.floor(lam).long().clamp(max=top)
    frac = (lam - l0.float()).clamp(0.0, 1.0)
    frac = torch.where(l0 >= top, torch.zeros_like(frac), frac)
    two = frac > 0
    needed = int((l0 + two.long()).max().item()) + 1 if n else 1
    sizes = torch.tensor(level_sizes(size, needed + 1), dtype=torch.long)
    bases = torch.cat([torch.zeros(1, dtype=torch.long), torch.cumsum(sizes * sizes, 0)])
    i0, w0 = _bilinear_taps(uv, sizes[l0], bases[l0])
    w0 = w0 * (1.0 - frac)[:, None]
    l1 = (l0 + 1).clamp(max=needed - 1)
    i1, w1 = _bilinear_taps(uv[two], sizes[l1[two]], bases[l1[two]])
    w1 = w1 * frac[two][:, None]
    counts = 4 + 4 * two.long()
    offsets = torch.zeros(n, dtype=torch.long)
    if n > 1:
        offsets[1:] = torch.cumsum(counts, 0)[:-1]
    # per pixel: its 4 taps of level l0, then (if it blends) its 4 of level l0 + 1
    index = torch.empty(int(counts.sum()), dtype=torch.long)
    weight = torch.empty(int(counts.sum()))
    pos0 = offsets[:, None] + torch.arange(4)
    index[pos0.reshape(-1)] = i0.reshape(-1)
    weight[pos0.reshape(-1)] = w0.reshape(-1)
    if bool(two.any()):
        pos1 = (offsets[two] + 4)[:, None] + torch.arange(4)
        index[pos1.reshape(-1)] = i1.reshape(-1)
        weight[pos1.reshape(-1)] = w1.reshape(-1)
    return MipTaps(index=index, weight=weight, offsets=offsets, levels=needed)


def coarse_table(level0: torch.Tensor, levels: int) -> torch.Tensor:
    """(T, T, C) texture -> (rows, C) table of levels 1..levels-1 concatenated (2x2 box averages),
    without gradient; 0 rows when levels == 1."""
    C = level0.shape[2]
    sizes = level_sizes(level0.shape[0], levels)[1:]
    table = level0.new_empty(sum(s * s for s in sizes), C)
    cur = level0.detach().contiguous()
    for part, s in zip(table.split([s * s for s in sizes]), sizes):
        mipkernel.downsample(cur.numpy(), part.view(s, s, C).numpy())
        cur = part.view(s, s, C)
    return table


def build_pyramid(level0: torch.Tensor, levels: int) -> torch.Tensor:
    """(T, T, C) texture -> (sum of level areas, C) table of levels 0..levels-1 (2x2 box averages;
    the coarse levels carry no gradient)."""
    T, _, C = level0.shape
    return torch.cat([level0.reshape(T * T, C), coarse_table(level0, levels)], 0)


def sample_taps(table: torch.Tensor, taps: MipTaps) -> torch.Tensor:
    """(N, C) filtered values of a whole pyramid table (see build_pyramid) at the taps."""
    if taps.offsets.numel() == 0:
        return table.new_zeros(0, table.shape[1])
    return F.embedding_bag(taps.index, table, taps.offsets, mode="sum", per_sample_weights=taps.weight)


class _MipSample(torch.autograd.Function):
    """Trilinear samples of a layer (T*T, C) at (uv, level of detail), by the compiled kernels of
    featuretex.model.mipkernel; the same taps and weights as mip_taps + sample_taps (the reference
    path, which tests compare it with).

    Forward: the coarser levels are built without gradient (a quarter of the texels) and the
    kernel blends level 0 (the parameter itself) and them. Backward: the coarse taps are scattered
    into the coarse table's gradient, which flows down level by level through the adjoint of the
    2x2 mean and is *written* into level 0's gradient (no zeroing pass over the largest buffer);
    then level 0's own taps are added.
    """

    @staticmethod
    def forward(ctx, flat: torch.Tensor, size: int, uv: torch.Tensor, lam: torch.Tensor,  # type: ignore[override]
                levels: int, top: int) -> torch.Tensor:
        K = flat.shape[1]
        sizes = level_sizes(size, levels + 1)
        bases = np.concatenate([[0], np.cumsum(np.square(sizes))]).astype(np.int64)
        coarse = coarse_table(flat.detach().view(size, size, K), levels)
        if coarse.shape[0] == 0:
            coarse = flat.new_zeros(1, K)   # never read: every tap is in level 0
        n = uv.shape[0]
        out = flat.new_empty(n, K)
        idx = torch.empty(n, 8, dtype=torch.int64)
        wts = torch.empty(n, 8)
        match_torch_threads(torch.get_num_threads())
        mipkernel.mip_forward(flat.detach().numpy(), coarse.numpy(), uv.contiguous().numpy(),
                              lam.contiguous().numpy(), np.asarray(sizes, np.int64), bases, int(top),
                              out.numpy(), idx.numpy(), wts.numpy())
        ctx.save_for_backward(idx, wts)
        ctx.sizes, ctx.coarse_rows = sizes[:levels], coarse.shape[0]
        return out

    @staticmethod
    @once_differentiable
    def backward(ctx, grad: torch.Tensor):  # type: ignore[override]
        idx, wts = ctx.saved_tensors
        sizes, C = ctx.sizes, grad.shape[1]
        grad, idx, wts = grad.contiguous().numpy(), idx.numpy(), wts.numpy()
        TT = sizes[0] * sizes[0]
        # bands of rows in parallel pay off for large layers only (measured: colour 1024^2 x 3 gains,
        # latent 256^2 x 8 loses to the thread launch)
        parts = max(1, torch.get_num_threads()) if TT * C >= 1 << 20 else 1
        g0 = torch.empty(TT, C)
        if len(sizes) > 1:   # coarse taps first; then coarsest to finest, each level into the next
            gc = torch.zeros(ctx.coarse_rows, C)
            mipkernel.mip_scatter(grad, idx, wts, gc.numpy(), TT, parts)
            views = [g.view(s, s, C).numpy() for g, s in zip([g0, *gc.split([s * s for s in sizes[1:]])], sizes)]
            for k in range(len(views) - 1, 0, -1):
                mipkernel.upsample_add(views[k - 1], views[k], k > 1)   # level 0 is written, not added to
        else:
            g0.zero_()
        mipkernel.mip_scatter(grad, idx, wts, g0.numpy(), 0, parts)
        return g0, None, None, None, None, None


class FeatureTexture(nn.Module):
    """Two layers in the mesh's UV layout: an RGB colour layer at T x T and C latent feature
    channels at the lower resolution T / latent_scale (only the screen-space decoder reads them).

    Why two resolutions: the colour layer must be as sharp as the photos allow (it is what gets
    baked), while view-dependent effects vary slowly over the surface; keeping the latent layer
    coarse cuts its cost by latent_scale^2. Parameters are stored flat, (T*T, K) with row
    i * T + j = texel (i, j): level 0 of the pyramid table without a copy.
    """

    def __init__(self, size: int, channels: int, latent_scale: int = 4):
        super().__init__()
        self.size, self.channels = int(size), int(channels)
        self.latent_size = max(1, self.size // max(1, int(latent_scale)))
        self.colour = nn.Parameter(torch.zeros(self.size * self.size, 3))                    # (T*T, 3) linear
        self.latent = nn.Parameter(torch.zeros(self.latent_size ** 2, self.channels))        # (Tl*Tl, C)

    @property
    def out_channels(self) -> int:
        return 3 + self.channels

    def colour_grid(self) -> torch.Tensor:
        """(T, T, 3) view of the colour layer, row 0 = top of the image (v = 1)."""
        return self.colour.view(self.size, self.size, 3)

    def latent_grid(self) -> torch.Tensor:
        """(Tl, Tl, C) view of the latent layer."""
        return self.latent.view(self.latent_size, self.latent_size, self.channels)

    @torch.no_grad()
    def initialise(self, colour_lin: np.ndarray, rng: np.random.Generator, latent_sigma: float = 0.01) -> None:
        """Colour layer = `colour_lin` (T0, T0, 3) linear (resized to T); latent layer small noise.

        The noise only breaks the symmetry between latent channels; the decoder's residual starts
        at zero, so the first render already equals the given bake.
        """
        col = resize_texture(np.asarray(colour_lin, np.float32), self.size)
        self.colour.copy_(torch.from_numpy(col.reshape(-1, 3)))
        noise = rng.normal(0.0, latent_sigma, tuple(self.latent.shape))
        self.latent.copy_(torch.from_numpy(noise.astype(np.float32)))

    def sample_colour(self, uv: torch.Tensor, rho: torch.Tensor | None) -> torch.Tensor:
        """(N, 3) colour layer at `uv` (N, 2) with footprints `rho` (N,) uv units per pixel (None = level 0)."""
        return sample_layer(self.colour, self.size, uv, rho)

    def sample_latent(self, uv: torch.Tensor, rho: torch.Tensor | None) -> torch.Tensor:
        """(N, C) latent layer at `uv` (N, 2) with footprints `rho` (N,) (None = level 0)."""
        return sample_layer(self.latent, self.latent_size, uv, rho)


def sample_layer(flat: torch.Tensor, size: int, uv: torch.Tensor, rho: torch.Tensor | None) -> torch.Tensor:
    """(N, K) trilinear samples of a layer stored flat (T*T, K) at `uv` (N, 2), footprints `rho` (N,).

    The pyramid is rebuilt from level 0 at each call (so gradients reach level 0). Building only
    the rows a batch touches, with sparse gradients and lazy Adam, was measured slower on the CPU
    at T = 1024 (2.1 s vs 1.6 s per step, 1 thread) and no faster at 2048: torch's sparse kernels
    cost more than the dense passes they save.
    """
    n = uv.shape[0]
    if n == 0:
        return flat.new_zeros(0, flat.shape[1])
    top = max_levels(size) - 1
    lam = torch.zeros(n) if rho is None else level_of_detail(rho, size).clamp(0.0, float(top))
    l0 = torch.floor(lam).clamp(max=top)
    levels = int((l0 + ((lam > l0) & (l0 < top)).float()).max().item()) + 1   # as mip_taps' `needed`
    return _MipSample.apply(flat, size, uv.float(), lam.float(), levels, top)


def resize_texture(tex: np.ndarray, size: int) -> np.ndarray:
    """(T0, T0, K) -> (size, size, K) float32: area averaging down, bilinear up (texel centres kept)."""
    if tex.shape[0] == size and tex.shape[1] == size:
        return np.ascontiguousarray(tex, dtype=np.float32)
    t = torch.from_numpy(np.ascontiguousarray(tex, dtype=np.float32)).permute(2, 0, 1)[None]
    if size < tex.shape[0]:
        out = F.interpolate(t, size=(size, size), mode="area")
    else:
        out = F.interpolate(t, size=(size, size), mode="bilinear", align_corners=False)
    return out[0].permute(1, 2, 0).contiguous().numpy()
