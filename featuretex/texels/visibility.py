"""Which texels a view sees, and which of its pixels count: the masks and the projection every
texel-space average (the classical bake, the bake of the fitted model, the fit's re-average, the
diagnosis) and the held-out scores share."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View
from featuretex.texels.config import DEPTH_TOL_PX, MIN_COS


@dataclass
class ViewSamples:
    """Where one view sees the texels."""

    idx: np.ndarray      # (N,) int64 flat texel indices seen by the view
    xy: np.ndarray       # (N, 2) float64 pixel coords of the texel centres in the view
    cos: np.ndarray      # (N,) float32 cosine between normal and direction to the camera
    px_per_unit: np.ndarray  # (N,) float32 pixels per scene unit at the texel (f / z)

    @property
    def weight(self) -> np.ndarray:
        """(N,) float64 cos x (f / z)^2: proportional to the texel's projected area in pixels, so
        sharper, closer views count more."""
        return self.cos.astype(np.float64) * self.px_per_unit.astype(np.float64) ** 2


def usable_mask(scene: Scene, view: View, gbuf: GBuffer, erode_px: int = 0) -> np.ndarray:
    """(H, W) bool: pixels showing the object (G-buffer coverage ∩ photo mask), eroded at edges by
    `erode_px`. With erode_px 0 these are the pixels held-out scores are computed over."""
    m = np.array(gbuf.coverage, dtype=bool)
    pm = scene.photo_mask(view)
    if pm is not None:
        m = m & pm
    if erode_px > 0:
        m = ndimage.binary_erosion(m, iterations=erode_px, border_value=0)
    return m


def view_samples(texels: TexelBuffer, view: View, gbuf: GBuffer, usable: np.ndarray,
                 min_cos: float = MIN_COS, depth_tol_px: float = DEPTH_TOL_PX) -> ViewSamples:
    """Project every surface texel into `view`; keep those facing it (cos > min_cos), visible (depth
    test within depth_tol_px pixel footprints) and on a `usable` (H, W) bool pixel."""
    idx = np.flatnonzero(texels.valid)
    pos = texels.position.reshape(-1, 3)[idx].astype(np.float64)
    nrm = texels.normal.reshape(-1, 3)[idx].astype(np.float64)
    to_cam = view.centre[None] - pos
    dist = np.linalg.norm(to_cam, axis=1)
    cos = np.einsum("ij,ij->i", nrm, to_cam) / np.maximum(dist, 1e-12)
    pc = view.to_camera(pos)
    keep = (cos > min_cos) & (pc[:, 2] > 1e-9)
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
    tol = depth_tol_px * footprint / np.maximum(cos, 0.2)
    vis = usable[iy, ix] & (np.abs(zbuf - z) <= tol)
    return ViewSamples(idx=idx[vis], xy=xy[vis], cos=cos[vis].astype(np.float32),
                       px_per_unit=(1.0 / footprint[vis]).astype(np.float32))
