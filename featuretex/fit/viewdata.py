"""Per-view tensors the fit reads every step, derived once from the G-buffer, mesh and photo."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F
from scipy import ndimage

from featuretex.model.lod import uv_footprint
from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View
from featuretex.scene.mesh import SceneMesh

PHOTO_MARGIN = 16  # px of edge-replicated border around each photo: room for alignment warps


@dataclass
class ViewData:
    name: str
    index: int                 # position among the fitted views; -1 for a held-out view
    uv: torch.Tensor           # (H, W, 2) float32 uv, v up (0 off the mesh)
    rho: torch.Tensor          # (H, W) float32 footprint, uv units per pixel
    cover: torch.Tensor        # (H, W) bool: surface at the pixel centre
    geo: torch.Tensor          # (12, H, W) float32 view direction + normal, camera then world axes
    photo: torch.Tensor | None = None       # (3, H + 2m, W + 2m) float32 linear, m = PHOTO_MARGIN
    loss_mask: torch.Tensor | None = None   # (H, W) bool: cover ∩ photo mask, eroded
    score_mask: torch.Tensor | None = None  # (H, W) bool: cover ∩ photo mask (as held-out scoring)
    valid_flat: np.ndarray | None = None    # (K,) int64 flat indices of loss_mask (crop centres)

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.cover.shape)  # type: ignore[return-value]


def geometry_inputs(gbuf: GBuffer, mesh: SceneMesh, view: View) -> tuple[np.ndarray, np.ndarray]:
    """(H, W, 2) uv and (12, H, W) float32: unit view direction (camera -> surface) and shading
    normal in camera axes, then both in world axes (0 off the mesh)."""
    uv = gbuf.uv(mesh)
    cov = np.asarray(gbuf.coverage)
    pos = gbuf.position(mesh)
    vdir_w = pos - view.centre.astype(np.float32)
    vdir_w /= np.maximum(np.linalg.norm(vdir_w, axis=-1, keepdims=True), 1e-12)
    nrm_w = gbuf.normal(mesh)
    R = view.R.astype(np.float32)
    geo = np.concatenate([vdir_w @ R.T, nrm_w @ R.T, vdir_w, nrm_w], axis=-1) * cov[..., None]
    return uv, np.ascontiguousarray(geo.transpose(2, 0, 1), dtype=np.float32)


def prepare_view(scene: Scene, gbuf: GBuffer, view: View, index: int, *, erode_px: int,
                 grads: np.ndarray | None = None, with_photo: bool = True) -> ViewData:
    """Tensors of one view; with_photo adds the padded photo and the loss / score masks."""
    mesh = scene.mesh
    uv, geo = geometry_inputs(gbuf, mesh, view)
    cov = np.array(gbuf.coverage)
    vd = ViewData(name=view.name, index=index, uv=torch.from_numpy(uv),
                  rho=torch.from_numpy(uv_footprint(gbuf, mesh, view, grads)),
                  cover=torch.from_numpy(cov), geo=torch.from_numpy(geo))
    if with_photo:
        pm = scene.photo_mask(view)
        score = cov & pm if pm is not None else cov
        loss = ndimage.binary_erosion(score, iterations=erode_px, border_value=0) if erode_px > 0 else score
        photo = torch.from_numpy(np.ascontiguousarray(scene.photo(view).transpose(2, 0, 1)))
        m = PHOTO_MARGIN
        vd.photo = F.pad(photo[None], (m, m, m, m), mode="replicate")[0]
        vd.loss_mask = torch.from_numpy(loss)
        vd.score_mask = torch.from_numpy(score)
        vd.valid_flat = np.flatnonzero(loss)
    return vd
