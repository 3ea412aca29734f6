"""The classical bake users do today: a visibility-tested, angle- and footprint-weighted average
of the photos per texel, in linear light. Every learned result is measured against it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from featuretex.bake.config import BaselineConfig
from featuretex.bake.gutter import fill_texture
from featuretex.bake.sampling import sample_image
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View


@dataclass
class ViewSamples:
    """Where one view sees the texels."""

    idx: np.ndarray      # (N,) int64 flat texel indices seen by the view
    xy: np.ndarray       # (N, 2) float64 pixel coords of the texel centres in the view
    cos: np.ndarray      # (N,) float32 cosine between normal and direction to the camera
    px_per_unit: np.ndarray  # (N,) float32 pixels per scene unit at the texel (f / z)


@dataclass
class BaselineResult:
    texture_lin: np.ndarray  # (T, T, 3) float32 linear, filled everywhere (gutter included)
    seen: np.ndarray         # (T, T) bool, texels measured by at least one view
    weight: np.ndarray       # (T, T) float32 total sample weight


def usable_mask(scene: Scene, view: View, gbuf: GBuffer, erode_px: int) -> np.ndarray:
    """(H, W) bool: pixels showing the object (G-buffer coverage ∩ photo mask), eroded at edges."""
    m = np.asarray(gbuf.coverage)
    pm = scene.photo_mask(view)
    if pm is not None:
        m = m & pm
    if erode_px > 0:
        m = ndimage.binary_erosion(m, iterations=erode_px, border_value=0)
    return m


def view_samples(texels: TexelBuffer, view: View, gbuf: GBuffer, usable: np.ndarray,
                 cfg: BaselineConfig) -> ViewSamples:
    """Project every surface texel into `view`; keep those visible (depth test) and usable."""
    idx = np.flatnonzero(texels.valid)
    pos = texels.position.reshape(-1, 3)[idx].astype(np.float64)
    nrm = texels.normal.reshape(-1, 3)[idx].astype(np.float64)
    to_cam = view.centre[None] - pos
    dist = np.linalg.norm(to_cam, axis=1)
    cos = np.einsum("ij,ij->i", nrm, to_cam) / np.maximum(dist, 1e-12)
    pc = view.to_camera(pos)
    keep = (cos > cfg.min_cos) & (pc[:, 2] > 1e-9)
    idx, pc, cos = idx[keep], pc[keep], cos[keep]
    xy = view.camera.project(pc)
    H, W = gbuf.shape
    ix, iy = np.rint(xy[:, 0]).astype(np.int64), np.rint(xy[:, 1]).astype(np.int64)
    inside = (ix >= 0) & (ix < W) & (iy >= 0) & (iy < H)
    idx, pc, cos, xy, ix, iy = idx[inside], pc[inside], cos[inside], xy[inside], ix[inside], iy[inside]
    z = pc[:, 2]
    f = 0.5 * (view.camera.fx + view.camera.fy)
    footprint = z / f  # scene units per pixel at the texel
    zbuf = np.asarray(gbuf.depth)[iy, ix]
    tol = cfg.depth_tol_px * footprint / np.maximum(cos, 0.2)
    vis = usable[iy, ix] & (np.abs(zbuf - z) <= tol)
    return ViewSamples(idx=idx[vis], xy=xy[vis], cos=cos[vis].astype(np.float32),
                       px_per_unit=(1.0 / footprint[vis]).astype(np.float32))


def bake_baseline(scene: Scene, gbuffers: dict[str, GBuffer], texels: TexelBuffer,
                  cfg: BaselineConfig | None = None) -> BaselineResult:
    """Weighted average of the fitted photos per texel (weight = cos x projected texel area)."""
    cfg = cfg or BaselineConfig()
    T = texels.size
    acc = np.zeros((T * T, 3), np.float64)
    wsum = np.zeros(T * T, np.float64)
    for view in scene.manifest.fitted:
        gbuf = gbuffers[view.name]
        s = view_samples(texels, view, gbuf, usable_mask(scene, view, gbuf, cfg.edge_erode_px), cfg)
        if len(s.idx) == 0:
            continue
        colour = sample_image(scene.photo(view), s.xy)
        # projected area of the texel in pixels ∝ cos * (f/z)^2: sharper, closer views count more
        w = s.cos.astype(np.float64) * s.px_per_unit.astype(np.float64) ** 2
        np.add.at(acc, s.idx, colour * w[:, None])
        np.add.at(wsum, s.idx, w)
    seen = (wsum > 0).reshape(T, T)
    tex = (acc / np.maximum(wsum, 1e-30)[:, None]).reshape(T, T, 3).astype(np.float32)
    tex = fill_texture(tex, seen, texels.valid, cfg.gutter)
    return BaselineResult(texture_lin=np.clip(tex, 0, 1), seen=seen, weight=wsum.reshape(T, T).astype(np.float32))
