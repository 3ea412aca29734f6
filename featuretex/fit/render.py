"""Full-frame renders of a fitted model (what the bake, diagnosis and scoring stages call).

Frames are rendered in bands of rows over the bounding box of the surface, each band padded by
the decoder's receptive halo, so results equal one full-frame pass with bounded memory.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import torch

from featuretex.fit.viewdata import PHOTO_MARGIN, ViewData, prepare_view
from featuretex.model.scene_model import PixelBatch, SceneModel
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import texel_uv
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View

BAND_PIXELS = 1 << 16  # pixels per band: bounds activations to a few tens of MB


@torch.no_grad()
def render_viewdata(model: SceneModel, vd: ViewData) -> tuple[np.ndarray, np.ndarray | None]:
    """(H, W, 3) head colour and (H, W, 3) screen residual (None without one), linear, 0 off the mesh."""
    H, W = vd.shape
    colour = np.zeros((H, W, 3), np.float32)
    residual = np.zeros((H, W, 3), np.float32) if model.decoder.screen is not None else None
    if vd.bbox is None:
        return colour, residual
    r0, r1, c0, c1 = vd.bbox
    halo = model.decoder.halo
    ca, cb = max(0, c0 - halo), min(W, c1 + halo)
    band = max(1, BAND_PIXELS // max(1, cb - ca))
    for top in range(r0, r1, band):
        bot = min(r1, top + band)
        ra, rb = max(0, top - halo), min(H, bot + halo)
        cov, uv, rho, geo = vd.crop(slice(ra, rb), slice(ca, cb))
        out = model(PixelBatch(cover=cov[None], uv=uv, rho=rho, geo=geo[None]))
        keep = slice(top - ra, top - ra + (bot - top))
        colour[top:bot, ca:cb] = out.colour[0, :, keep].permute(1, 2, 0).numpy()
        if residual is not None and out.residual is not None:
            residual[top:bot, ca:cb] = out.residual[0, :, keep].permute(1, 2, 0).numpy()
    return colour, residual


def _view_data(model: SceneModel, scene: Scene, gbuffer: GBuffer, view: View) -> ViewData:
    vi = model.view_index(view.name)
    return prepare_view(scene, gbuffer, view, -1 if vi is None else vi, erode_px=0, with_photo=False)


@torch.no_grad()
def apply_view_colour(model: SceneModel, view_name: str, img: np.ndarray) -> np.ndarray:
    """(H, W, 3) linear render -> with the fitted exposure of `view_name` (unchanged if not fitted)."""
    v = model.view_index(view_name)
    if v is None or model.corrections is None:
        return img
    M, b = model.corrections.colour(torch.tensor([v]))
    return (img @ M[0].numpy().T + b[0].numpy()).astype(np.float32)


def render_view(model: SceneModel, scene: Scene, gbuffer: GBuffer, view: View, *,
                corrections: bool = False) -> np.ndarray:
    """(H, W, 3) float32 linear render (head + screen residual), full frame, 0 off the mesh.

    corrections=False renders with the reference exposure (how held-out views are scored);
    True applies the view's fitted colour affine (fitted views only). Alignment fields act on the
    photos (see `aligned_photo`), never on renders.
    """
    colour, residual = render_viewdata(model, _view_data(model, scene, gbuffer, view))
    img = colour if residual is None else colour + residual
    return apply_view_colour(model, view.name, img) if corrections else img


def render_decoder_residual(model: SceneModel, scene: Scene, gbuffer: GBuffer, view: View) -> np.ndarray:
    """(H, W, 3) float32 linear: what the screen-space decoder adds to the head at `view` (0 if none)."""
    _, residual = render_viewdata(model, _view_data(model, scene, gbuffer, view))
    return residual if residual is not None else np.zeros(gbuffer.shape + (3,), np.float32)


def residual_renderer(model: SceneModel, scene: Scene, gbuffers: dict[str, GBuffer]
                      ) -> Callable[[View], np.ndarray] | None:
    """view -> its `render_decoder_residual`, what the bake reprojects; None when the model has no
    screen-space decoder (nothing to reproject)."""
    if getattr(model.decoder, "screen", None) is None:
        return None
    return lambda view: render_decoder_residual(model, scene, gbuffers[view.name], view)


@torch.no_grad()
def render_texel_head(model: SceneModel, size: int | None = None) -> np.ndarray:
    """(T, T, 3) float32 linear: the head applied per texel — the exactly bakeable RGB texture.

    At the model's own size this is the head on every texel; another size resamples the colour
    layer with the same mip filter (texel centres of the new grid, footprint of one new texel).
    """
    tex = model.texture
    T = tex.size if size is None else int(size)
    if T == tex.size:
        return model.decoder.head(tex.colour_grid()).numpy().astype(np.float32)
    uv = torch.from_numpy(texel_uv(T).reshape(-1, 2).astype(np.float32))
    feat = tex.sample_colour(uv, torch.full((T * T,), 1.0 / T))
    return model.decoder.head(feat).reshape(T, T, 3).numpy().astype(np.float32)


@torch.no_grad()
def aligned_photo(model: SceneModel, scene: Scene, view: View) -> np.ndarray:
    """(H, W, 3) float32 linear photo of a fitted view warped by its alignment field onto the render
    (the photo as the fit compared it); other views' photos are returned unchanged."""
    photo = scene.photo(view)
    v = model.view_index(view.name)
    if v is None or model.corrections is None:
        return photo
    H, W = photo.shape[:2]
    d = torch.from_numpy(model.corrections.full_field(v, H, W))
    t = torch.from_numpy(np.ascontiguousarray(photo.transpose(2, 0, 1)))[None]
    ys, xs = torch.meshgrid(torch.arange(H, dtype=torch.float32), torch.arange(W, dtype=torch.float32),
                            indexing="ij")
    src = torch.stack([xs, ys], -1) + d
    g = 2.0 * src / torch.tensor([max(W - 1, 1), max(H - 1, 1)], dtype=torch.float32) - 1.0
    out = torch.nn.functional.grid_sample(t, g[None], mode="bilinear", padding_mode="border", align_corners=True)
    return out[0].permute(1, 2, 0).numpy().astype(np.float32)


__all__ = ["render_view", "render_texel_head", "render_decoder_residual", "residual_renderer", "aligned_photo",
           "render_viewdata", "apply_view_colour", "PHOTO_MARGIN"]
