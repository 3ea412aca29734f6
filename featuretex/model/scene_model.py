"""The fitted model of one scan: feature texture + decoder (+ per-view corrections of fitted views)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

from featuretex import plugins
from featuretex.model.corrections import ViewCorrections
from featuretex.model.decoders import TexelDecoder
from featuretex.model.texture import FeatureTexture


@dataclass
class PixelBatch:
    """Screen-space inputs of B equally sized image tiles."""

    cover: torch.Tensor     # (B, h, w) bool: a surface is seen at the pixel centre
    uv: torch.Tensor        # (N, 2) float32 uv (v up) of the covered pixels, row-major over cover
    rho: torch.Tensor       # (N,) float32 footprint, uv units per pixel
    geo: torch.Tensor       # (B, GEO_CHANNELS, h, w) float32 view direction + normal (0 off the mesh),
                            # channels-last memory (as the crops make it; the decoder runs in that layout)


@dataclass
class Render:
    colour: torch.Tensor            # (B, 3, h, w) linear: the bakeable per-texel head, 0 off the mesh
    residual: torch.Tensor | None   # (B, 3, h, w) linear screen-space residual, or None

    @property
    def total(self) -> torch.Tensor:
        return self.colour if self.residual is None else self.colour + self.residual


def _scatter_image(values: torch.Tensor, flat: torch.Tensor, B: int, h: int, w: int) -> torch.Tensor:
    """(N, K) per covered pixel -> (B, K, h, w) image in channels-last memory, 0 off the mesh."""
    K = values.shape[1]
    dense = values.new_zeros(B * h * w, K).index_copy(0, flat, values)
    return dense.view(B, h, w, K).permute(0, 3, 1, 2)


class SceneModel(nn.Module):
    def __init__(self, size: int, channels: int, decoder: str, decoder_kwargs: dict[str, Any],
                 corrections: ViewCorrections | None = None, latent_scale: int = 4, mip: bool = True,
                 precision: str = "float32"):
        super().__init__()
        self.mip = bool(mip)  # False: plain bilinear lookups of level 0 (for measuring what mipmapping gains)
        self.texture = FeatureTexture(size, channels, latent_scale)
        self.latent_scale = int(latent_scale)
        cls = plugins.load("decoders", decoder)
        self.decoder: TexelDecoder = cls(channels, **decoder_kwargs)
        self.decoder_name = decoder
        self.decoder_kwargs = dict(decoder_kwargs)
        self.corrections = corrections
        self.precision = precision        # "float32" or "bfloat16": the screen decoder's convolutions
        if self.decoder.screen is not None:
            self.decoder.screen.bfloat16 = precision == "bfloat16"

    def forward(self, batch: PixelBatch) -> Render:
        B, h, w = batch.cover.shape
        C = self.texture.channels
        flat = torch.nonzero(batch.cover.reshape(-1), as_tuple=True)[0]
        rho = batch.rho if self.mip else None
        if self.decoder.screen is None:
            colour = self.decoder.head(self.texture.sample_colour(batch.uv, rho))   # (N, 3)
            dense = colour.new_zeros(B * h * w, 3).index_copy(0, flat, colour)
            return Render(colour=dense.reshape(B, h, w, 3).permute(0, 3, 1, 2).contiguous(), residual=None)
        colour = self.decoder.head(self.texture.sample_colour(batch.uv, rho))   # (N, 3)
        latent = self.texture.sample_latent(batch.uv, rho)                      # (N, C)
        # pixel-major (channels-last) images, written once each: no slices of a shared tensor, whose
        # backward would allocate and add full-size zero gradients
        colour_img = _scatter_image(colour, flat, B, h, w)                      # (B, 3, h, w)
        img = _scatter_image(torch.cat([latent, colour], 1), flat, B, h, w)     # (B, C + 3, h, w)
        res = self.decoder.residual_packed(img, C, batch.geo)
        if res is not None:
            res = res * batch.cover[:, None].to(res.dtype)
        return Render(colour=colour_img, residual=res)

    def meta(self) -> dict[str, Any]:
        """Plain-typed description (loadable with torch.load(weights_only=True))."""
        c = self.corrections
        return {"size": self.texture.size, "channels": self.texture.channels, "latent_scale": self.latent_scale, "mip": self.mip,
                "precision": self.precision,
                "decoder": self.decoder_name,
                "decoder_kwargs": self.decoder_kwargs,
                "views": list(c.names) if c is not None else [],
                "grid_hw": list(c.align.shape[2:]) if c is not None else [],
                "image_sizes": c.sizes.tolist() if c is not None else [],
                "reference": c.reference if c is not None else 0}

    @classmethod
    def from_meta(cls, meta: dict[str, Any]) -> "SceneModel":
        corr = None
        if meta["views"]:
            corr = ViewCorrections(meta["views"], [tuple(s) for s in meta["image_sizes"]],
                                   tuple(meta["grid_hw"]), meta["reference"])
        return cls(meta["size"], meta["channels"], meta["decoder"], meta["decoder_kwargs"], corr,
                   meta.get("latent_scale", 4), meta.get("mip", True), meta.get("precision", "float32"))

    def view_index(self, name: str) -> int | None:
        if self.corrections is None or name not in self.corrections.names:
            return None
        return self.corrections.names.index(name)
