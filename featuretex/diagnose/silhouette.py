"""Silhouette consistency: the mesh's outline in each view against the photo's object mask.

Photometric evidence cannot see a wrong surface where the paint is plain; the outline can. At an
outer silhouette (a covered pixel next to background) the surface normal lies in the image plane,
so the image gap between the mesh outline and the mask's edge, times depth / focal length, is the
offset along the normal to the photographed surface (the shape-from-silhouette relation). Sign as
`displacement` elsewhere: positive = the photo shows object beyond the mesh = the true surface lies
outside the scan (a dent in the scan).

Per view:   gaps at the outline pixels (signed distance of the mask), minus a robust fit of the
            view's global mask-vs-mesh misregistration (shift, in-plane rotation, uniform erosion
            or dilation of the mask) so calibration does not read as geometry; |gap| <= a deadband
            (mask thresholding, pixel quantisation) counts as 0.
Per texel:  the gaps back-projected through the G-buffer's UVs, median over the views that see
            the texel at their outline.
Spread:     silhouette texels form thin lines in UV; a Gaussian-weighted mean (normalised
            convolution) grown by heat diffusion inside the surface texels of the grid, so it
            never jumps a UV gap, bounded to where the measurement support is enough.

Limit: the gap is the distance to the true outline, an upper bound on the normal offset at the
texel; they agree while the defect's slope is small (error about slope^2 / (2 curvature) scene
units), and a concave defect is seen only at its shoulders (the spread carries it inwards).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from featuretex.diagnose.config import DiagnoseConfig
from featuretex.raster.gbuffer import GBuffer, interpolate
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View


@dataclass
class OutlinePixels:
    """A view's outer-silhouette pixels (M of them)."""

    x: np.ndarray        # (M,) int64 column
    y: np.ndarray        # (M,) int64 row
    outward: np.ndarray  # (M, 2) float64 unit image-plane normal of the outline, pointing to background
    depth: np.ndarray    # (M,) float64 camera-space z, scene units
    texel: np.ndarray    # (M,) int64 flat working-grid index (-1 when the uv lands off the surface)


@dataclass
class ViewGaps:
    """One view's silhouette measurements."""

    name: str
    texel: np.ndarray    # (M,) int64 flat working-grid index
    gap_px: np.ndarray   # (M,) float64 local gap after calibration and deadband, px
    offset: np.ndarray   # (M,) float64 the same along the normal, scene units (gap x depth / f)
    footprint: np.ndarray  # (M,) float64 scene units per pixel at the outline
    calibration: np.ndarray  # (4,) removed global part: dilation px, shift x px, shift y px, rotation rad


def signed_distance(mask: np.ndarray) -> np.ndarray:
    """(H, W) float32 px: distance from each pixel centre to the mask's edge, + inside, - outside.

    The edge is taken halfway between a pixel and its nearest pixel of the other class, so a
    pixel at the rim of the mask reads +0.5 and its background neighbour -0.5."""
    inside = ndimage.distance_transform_edt(mask)
    outside = ndimage.distance_transform_edt(~mask)
    return np.where(mask, inside - 0.5, 0.5 - outside).astype(np.float32)


def outline_pixels(view: View, gbuf: GBuffer, mesh, grid: TexelBuffer, cfg: DiagnoseConfig,
                   margin: int) -> OutlinePixels:
    """Covered pixels 4-adjacent to background, whose normal is within the image plane (a true
    occluding contour, not the rim of a hole or an open edge seen from the front), at least
    `margin` px from the image border (beyond it the mask's edge is unknown)."""
    cov = np.asarray(gbuf.coverage)
    H, W = cov.shape
    bg = ~cov
    near_bg = np.zeros_like(cov)
    near_bg[1:] |= bg[:-1]
    near_bg[:-1] |= bg[1:]
    near_bg[:, 1:] |= bg[:, :-1]
    near_bg[:, :-1] |= bg[:, 1:]
    sil = cov & near_bg
    sil[:margin] = sil[-margin:] = False
    sil[:, :margin] = sil[:, -margin:] = False
    y, x = np.nonzero(sil)
    tri = gbuf.tri[y, x]
    b1, b2 = gbuf.data["b1"][y, x], gbuf.data["b2"][y, x]
    pos = interpolate(tri, b1, b2, mesh.faces, mesh.vertices).astype(np.float64)
    nrm = interpolate(tri, b1, b2, mesh.faces, mesh.normals).astype(np.float64)
    nrm /= np.maximum(np.linalg.norm(nrm, axis=1, keepdims=True), 1e-12)
    ray = view.centre[None] - pos
    cos = np.abs(np.einsum("ij,ij->i", nrm, ray)) / np.maximum(np.linalg.norm(ray, axis=1), 1e-12)
    # outward image normal: down the gradient of the smoothed coverage
    soft = ndimage.gaussian_filter(cov.astype(np.float32), 1.0)
    gy, gx = np.gradient(soft)
    g = -np.stack([gx[y, x], gy[y, x]], axis=1).astype(np.float64)
    glen = np.linalg.norm(g, axis=1)
    keep = (cos <= cfg.silhouette_max_cos) & (glen > 1e-6)
    uv = interpolate(tri[keep], b1[keep], b2[keep], mesh.faces, mesh.uv).astype(np.float64)
    D = grid.size
    col = np.clip(np.floor(uv[:, 0] * D).astype(np.int64), 0, D - 1)
    row = np.clip(np.floor((1.0 - uv[:, 1]) * D).astype(np.int64), 0, D - 1)
    texel = np.where(grid.valid[row, col], row * D + col, -1)
    return OutlinePixels(x=x[keep].astype(np.int64), y=y[keep].astype(np.int64),
                         outward=g[keep] / glen[keep, None], depth=np.asarray(gbuf.depth, np.float64)[y[keep], x[keep]],
                         texel=texel)


def calibration_design(px: OutlinePixels, cx: float, cy: float) -> np.ndarray:
    """(M, 4) how each outline gap (px, + outwards) responds to the view's global errors: a uniform
    dilation of the mask (1 px), an image shift (1 px in x, in y) and an in-plane rotation about
    the principal point (1 rad, scaled by the outline's radius so the columns are comparable)."""
    dx, dy = px.x - cx, px.y - cy
    radius = max(float(np.sqrt(np.mean(dx * dx + dy * dy))), 1.0)
    m = px.outward
    # a mask moved by s makes the gap at outward normal m grow by s . m; rotated by w, by w (z x r) . m
    rot = (-dy * m[:, 0] + dx * m[:, 1]) / radius
    return np.stack([np.ones(len(m)), m[:, 0], m[:, 1], rot], axis=1)


def robust_fit(A: np.ndarray, b: np.ndarray, iterations: int = 8, ridge: float = 1e-3) -> np.ndarray:
    """(K,) parameters of b ~ A p by iteratively reweighted least squares with Tukey's biweight
    (c = 4.685 robust sigmas, the 95 %-efficiency constant), so a local defect on part of the
    outline does not pull the global fit. A small ridge keeps degenerate outlines solvable (a
    short straight outline cannot tell a shift along it from a rotation)."""
    w = np.ones(len(b))
    p = np.zeros(A.shape[1])
    for _ in range(iterations):
        Aw = A * w[:, None]
        N = Aw.T @ A
        N += ridge * np.trace(N) / len(N) * np.eye(len(N))
        p = np.linalg.solve(N, Aw.T @ b)
        r = b - A @ p
        sigma = max(1.4826 * float(np.median(np.abs(r))), 0.3)   # floor: quantised gaps are ~0.3 px apart
        u = r / (4.685 * sigma)
        w = np.where(np.abs(u) < 1, (1 - u * u) ** 2, 0.0)
        if w.sum() < A.shape[1] * 3:
            break
    return p


def view_gaps(scene: Scene, view: View, gbuf: GBuffer, grid: TexelBuffer, cfg: DiagnoseConfig) -> ViewGaps | None:
    """The silhouette gaps of one view (None: no photo mask, or too short an outline)."""
    mask = scene.photo_mask(view)
    if mask is None:
        return None
    margin = int(math.ceil(cfg.silhouette_max_gap_px)) + 1
    px = outline_pixels(view, gbuf, scene.mesh, grid, cfg, margin)
    if len(px.x) < cfg.silhouette_min_pixels:
        return None
    sdf = signed_distance(np.asarray(mask, bool))
    # the mesh outline pixel reads +0.5 against its own coverage; what the mask adds is the gap
    gap = np.clip(sdf[px.y, px.x].astype(np.float64) - 0.5, -cfg.silhouette_max_gap_px, cfg.silhouette_max_gap_px)
    cam = view.camera
    A = calibration_design(px, cam.cx, cam.cy)
    calib = robust_fit(A, gap) if cfg.silhouette_remove_global else np.zeros(4)
    local = gap - A @ calib
    radius = max(float(np.sqrt(np.mean((px.x - cam.cx) ** 2 + (px.y - cam.cy) ** 2))), 1.0)
    calib = calib * np.array([1.0, 1.0, 1.0, 1.0 / radius])     # rotation column back to radians
    local[np.abs(local) <= cfg.silhouette_deadband_px] = 0.0
    f = 0.5 * (cam.fx + cam.fy)
    fp = px.depth / f
    on = px.texel >= 0
    return ViewGaps(name=view.name, texel=px.texel[on], gap_px=local[on], offset=(local * fp)[on],
                    footprint=fp[on], calibration=calib)


def per_texel_median(views: list[ViewGaps], n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(n,) float64 median over views of each texel's (per view averaged) offset, scene units, NaN
    where no view has the texel at its outline; (n,) int number of such views; (n,) mean footprint."""
    keys, vals, fps = [], [], []
    for v in views:
        cnt = np.bincount(v.texel, minlength=n)
        has = np.flatnonzero(cnt)
        keys.append(has)
        vals.append(np.bincount(v.texel, v.offset, n)[has] / cnt[has])
        fps.append(np.bincount(v.texel, v.footprint, n)[has] / cnt[has])
    med = np.full(n, np.nan)
    count = np.zeros(n, np.int64)
    foot = np.full(n, np.nan)
    if not keys:
        return med, count, foot
    k, x, fp = np.concatenate(keys), np.concatenate(vals), np.concatenate(fps)
    order = np.lexsort((x, k))
    k, x = k[order], x[order]
    uniq, start, cnt = np.unique(k, return_index=True, return_counts=True)
    lo = start + (cnt - 1) // 2
    hi = start + cnt // 2
    med[uniq] = 0.5 * (x[lo] + x[hi])
    count[uniq] = cnt
    foot[uniq] = np.bincount(np.concatenate(keys), fp, n)[uniq] / cnt
    return med, count, foot


def diffuse(fields: np.ndarray, valid: np.ndarray, steps: int) -> np.ndarray:
    """`steps` passes of the 3 x 3 binomial kernel ([1 2 1] / 4 each way: variance 1/2 texel^2 per
    axis and pass, so sigma = sqrt(steps / 2) texels) over (K, D, D) float64 `fields`, restricted to
    the (D, D) `valid` texels: what reaches an off-surface texel is dropped, so nothing crosses a
    UV gap and the spread follows the surface inside each island."""
    f = np.where(valid[None], fields, 0.0)
    for _ in range(steps):
        for axis in (1, 2):
            g = 2.0 * f
            lo = [slice(None)] * 3
            hi = [slice(None)] * 3
            lo[axis], hi[axis] = slice(1, None), slice(None, -1)
            g[tuple(lo)] += f[tuple(hi)]
            g[tuple(hi)] += f[tuple(lo)]
            f = 0.25 * g
        f *= valid[None]
    return f


def spread(value: np.ndarray, valid: np.ndarray, sigma_texels: float, min_support: float
           ) -> tuple[np.ndarray, np.ndarray]:
    """Normalised convolution of the measured texels (finite `value`, (D, D)) over the surface:
    ((D, D) Gaussian-weighted mean, NaN where unsupported; (D, D) support).

    support: measured share of the kernel's surface weight (edge-corrected), times sqrt(2 pi)
    sigma so one straight line of measured texels reads 1 on it and exp(-r^2 / 2 sigma^2) at a
    distance r; the mean is kept where support >= min_support."""
    have = valid & np.isfinite(value)
    steps = max(int(round(2.0 * sigma_texels ** 2)), 1)
    stack = np.stack([np.where(have, value, 0.0), have.astype(np.float64), valid.astype(np.float64)])
    num, den, base = diffuse(stack, valid, steps)
    sigma = math.sqrt(steps / 2.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = num / den
        support = np.where(base > 1e-12, den / base, 0.0) * math.sqrt(2 * math.pi) * sigma
    keep = valid & (den > 1e-12) & (support >= min_support)
    return np.where(keep, mean, np.nan), np.where(valid, support, np.nan)


@dataclass
class SilhouetteEvidence:
    """Per working texel, (D, D)."""

    raw: np.ndarray        # float32 median over views of the outline offset, scene units; NaN unmeasured
    views: np.ndarray      # int16 views with the texel at their outline
    offset: np.ndarray     # float32 `raw` spread over the surface, scene units; NaN unsupported
    support: np.ndarray    # float32 measurement support of `offset` (1 = on a line of measurements)
    footprint: np.ndarray  # float32 scene units per outline pixel near the texel (spread like offset)
    calibration: dict[str, np.ndarray]  # per view (4,): dilation px, shift x, y px, rotation rad removed


def silhouette_evidence(scene: Scene, gbuffers: dict[str, GBuffer], grid: TexelBuffer, cell: float,
                        cfg: DiagnoseConfig) -> SilhouetteEvidence | None:
    """Outline gaps of every fitted view with a photo mask, on the working grid; None without masks.
    `cell`: working texel edge, scene units (sets the spread's sigma in texels)."""
    views = []
    for view in scene.manifest.fitted:
        g = view_gaps(scene, view, gbuffers[view.name], grid, cfg)
        if g is not None:
            views.append(g)
    if not views:
        return None
    D = grid.size
    med, count, foot = per_texel_median(views, D * D)
    raw = med.reshape(D, D)
    size = scene.mesh.extent
    sigma_units = cfg.silhouette_spread_units if cfg.silhouette_spread_units > 0 else cfg.silhouette_spread_fraction * size
    sigma_tex = sigma_units / cell if cell > 0 and math.isfinite(cell) else 1.0
    offset, support = spread(raw, grid.valid, sigma_tex, cfg.silhouette_min_support)
    fp, _ = spread(foot.reshape(D, D), grid.valid, sigma_tex, cfg.silhouette_min_support)
    return SilhouetteEvidence(raw=raw.astype(np.float32), views=count.reshape(D, D).astype(np.int16),
                              offset=offset.astype(np.float32), support=support.astype(np.float32),
                              footprint=fp.astype(np.float32),
                              calibration={v.name: v.calibration for v in views})
