"""Where each fitted view sees the working grid's texels, and its photo made ready to sample:
colour-corrected to the fit's common albedo scale and low-passed to the grid's sampling rate."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from featuretex.diagnose.alignment import ViewCorrection
from featuretex.diagnose.config import DiagnoseConfig
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View
from featuretex.texels.sampling import sample_image
from featuretex.texels.visibility import usable_mask, view_samples

LUMA = np.array([0.2126, 0.7152, 0.0722], np.float32)  # Rec. ITU-R BT.709 luma weights


@dataclass
class Observation:
    """One fitted view's usable samples of the working grid (N texels away from its silhouettes)."""

    view: View
    seen: np.ndarray       # (M,) int64 flat indices of every texel the view sees usably (silhouettes too)
    idx: np.ndarray        # (N,) int64 flat texel indices of the working grid
    xy: np.ndarray         # (N, 2) float64 pixel coords of the texel centres (x right, y down)
    cos: np.ndarray        # (N,) float32 cosine between the normal and the direction to the camera
    depth: np.ndarray      # (N,) float64 camera-space z, scene units
    colour: np.ndarray     # (H, W, 3) float32 linear photo, colour-corrected and low-passed
    grey: np.ndarray       # (H, W) float32 sRGB-encoded luma of `colour`
    correction: ViewCorrection | None
    shift: np.ndarray = field(default_factory=lambda: np.zeros(2))  # (2,) px whole-view registration
                                                                     # error (calibration), added to projections

    @property
    def focal(self) -> float:
        return 0.5 * (self.view.camera.fx + self.view.camera.fy)

    def sample_colour(self, xy: np.ndarray) -> np.ndarray:
        """(N, 3) float32 linear colour at pixel coords xy (N, 2)."""
        return sample_image(self.colour, xy)

    def sample_grey(self, xy: np.ndarray) -> np.ndarray:
        """(N,) float32 sRGB luma at pixel coords xy (N, 2)."""
        return sample_image(self.grey[..., None], xy)[:, 0]


def observe(scene: Scene, gbuffers: dict[str, GBuffer], grid: TexelBuffer, cell: float,
            corrections: dict[str, ViewCorrection] | None, cfg: DiagnoseConfig) -> list[Observation]:
    """Usable samples of every fitted view: visible, seen at an angle with cos >= min_cos, and from
    no farther than max_footprint_ratio x the median pixel footprint. `cell`: working texel edge,
    scene units (sets the photo low-pass)."""
    rule = (cfg.min_cos, cfg.depth_tol_px)
    raw = []
    for view in scene.manifest.fitted:
        gbuf = gbuffers[view.name]
        # near a silhouette a sample may mix in background: it counts for coverage, not for colour
        everything = view_samples(grid, view, gbuf, usable_mask(scene, view, gbuf, 0), *rule)
        inner = usable_mask(scene, view, gbuf, cfg.edge_erode_px) & ~occlusion_edges(gbuf, cfg)
        s = view_samples(grid, view, gbuf, inner, *rule)
        raw.append((view, everything, s))
    footprints = [1.0 / s.px_per_unit for _, s, _ in raw if len(s.idx)]
    if not footprints:
        return []
    median_fp = float(np.median(np.concatenate(footprints)))
    out = []
    limit = cfg.max_footprint_ratio * median_fp
    for view, everything, s in raw:
        fp = 1.0 / s.px_per_unit.astype(np.float64)
        # evidence only from views facing the texel well: grazing views foreshorten a patch so much
        # that it no longer looks like the same patch seen from the front (MVS common practice)
        keep = (fp <= limit) & (s.cos >= cfg.judge_min_cos)
        seen = everything.idx[1.0 / everything.px_per_unit <= limit]
        if not keep.any():
            continue
        corr = corrections.get(view.name) if corrections else None
        spacing_px = cell / float(np.median(fp[keep]))
        colour = prepared_photo(scene.photo(view), corr, spacing_px)
        out.append(Observation(view=view, seen=seen, idx=s.idx[keep], xy=s.xy[keep], cos=s.cos[keep],
                               depth=fp[keep] * 0.5 * (view.camera.fx + view.camera.fy),
                               colour=colour, grey=luma(colour), correction=corr))
    return out


def occlusion_edges(gbuf: GBuffer, cfg: DiagnoseConfig) -> np.ndarray:
    """(H, W) bool: pixels within edge_erode_px of a depth jump inside the object (a handle in front
    of the body). There a small error in the mesh changes what the photo shows, so a sample of
    the surface behind (or in front) is no evidence about its own geometry."""
    z = np.asarray(gbuf.depth, np.float32)
    cov = np.asarray(gbuf.coverage)
    big = np.where(cov, z, 0.0)
    lo = ndimage.minimum_filter(np.where(cov, z, np.inf), size=3)
    hi = ndimage.maximum_filter(big, size=3)
    jump = cov & np.isfinite(lo) & (hi - lo > cfg.occlusion_jump * np.maximum(z, 1e-12))
    if cfg.edge_erode_px > 0 and jump.any():
        jump = ndimage.binary_dilation(jump, iterations=cfg.edge_erode_px)
    return jump


def prepared_photo(photo: np.ndarray, corr: ViewCorrection | None, spacing_px: float) -> np.ndarray:
    """(H, W, 3) float32 linear: the fit's colour model photo ~ M albedo + b inverted, then a Gaussian
    low-pass of sigma = spacing/2 px when grid samples are sparser than pixels (anti-aliasing,
    common practice)."""
    img = photo
    if corr is not None:
        inv = np.linalg.inv(corr.matrix.astype(np.float64)).T.astype(np.float32)
        img = ((photo.reshape(-1, 3) - corr.bias.astype(np.float32)) @ inv).reshape(photo.shape)
    if spacing_px > 1.2:
        s = 0.5 * spacing_px
        img = ndimage.gaussian_filter(img, sigma=(s, s, 0), mode="nearest")
    return np.asarray(img, np.float32)


def luma(linear: np.ndarray) -> np.ndarray:
    """(H, W) float32 luma of sRGB-encoded values (BT.709 weights on the encoded channels)."""
    return (linear_to_srgb(linear) @ LUMA).astype(np.float32)
