"""Alignment evidence: the fit's per-view alignment fields brought back onto the surface.

The fit warps each photo onto the render, target(x) = photo(x + d(x)) (featuretex/model/
corrections.py), so d is where the photo really shows what the mesh puts at x: for a texel at p
whose photographed surface point is p' = p + t n + (tangential slip), d = pi(p') - pi(p). We
convert d from pixels to scene units with the pinhole relation (lateral size = pixels x depth /
focal length), and solve the views' fields together for the offset t along the normal.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from featuretex.errors import input_error
from featuretex.scene.loaded import Scene
from featuretex.texels.sampling import sample_image


@dataclass
class ViewCorrection:
    """What the fit learned about one view."""

    matrix: np.ndarray         # (3, 3) float32 colour matrix M: photo ~ M albedo + b, linear light
    bias: np.ndarray           # (3,) float32 b, linear light
    field: np.ndarray | None   # (h, w, 2) float32 (dx, dy) px at nodes spanning the pixel centres


def load_corrections(path: str | Path) -> dict[str, np.ndarray]:
    """The arrays of `fit/corrections.npz` as a plain dict."""
    with np.load(path, allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


def parse_corrections(corrections: dict | None, scene: Scene) -> dict[str, ViewCorrection] | None:
    """{view name: ViewCorrection} from the fit's arrays (colour_matrix (V,3,3), colour_bias (V,3),
    alignment_px (V,h,w,2), optional names (V,)); views in fitted order when no names are given."""
    if not corrections:
        return None
    names = corrections.get("views", corrections.get("names"))
    fitted = [v.name for v in scene.manifest.fitted]
    names = [str(n) for n in names] if names is not None else fitted
    M = np.asarray(corrections.get("colour_matrix", np.broadcast_to(np.eye(3), (len(names), 3, 3))), np.float32)
    b = np.asarray(corrections.get("colour_bias", np.zeros((len(names), 3))), np.float32)
    a = corrections.get("alignment_px", corrections.get("alignment"))
    if len(M) != len(names) or len(b) != len(names) or (a is not None and len(a) != len(names)):
        raise input_error(scene.file, f"fit corrections hold {len(M)} views but name {len(names)}",
                          field="fit/corrections.npz")
    return {n: ViewCorrection(matrix=M[i], bias=b[i], field=None if a is None else np.asarray(a[i], np.float32))
            for i, n in enumerate(names)}


def field_at(field: np.ndarray, xy: np.ndarray, width: int, height: int) -> np.ndarray:
    """(N, 2) float32 displacement px at pixel coords xy (N, 2): bilinear between nodes, which span
    pixel centres 0..W-1 and 0..H-1 evenly (align_corners convention, as the fit samples them)."""
    h, w = field.shape[:2]
    g = np.stack([xy[:, 0] * (w - 1) / max(width - 1, 1), xy[:, 1] * (h - 1) / max(height - 1, 1)], axis=1)
    return sample_image(field, g)


def global_shift(field: np.ndarray, xy: np.ndarray, width: int, height: int) -> np.ndarray:
    """(2,) px median of a view's field over where it sees the surface: the part of the
    misregistration shared by the whole view (calibration), not local to some surface."""
    return np.median(field_at(field, xy, width, height), axis=0).astype(np.float64) if len(xy) else np.zeros(2)


def projection_jacobian(R: np.ndarray, pc: np.ndarray, fx: float, fy: float) -> np.ndarray:
    """(N, 2, 3) d(pixel)/d(world point) of a pinhole camera at camera-space points pc (N, 3)."""
    x, y, z = pc[:, 0], pc[:, 1], pc[:, 2]
    J = np.zeros((len(pc), 2, 3))
    J[:, 0, 0] = fx / z
    J[:, 0, 2] = -fx * x / z ** 2
    J[:, 1, 1] = fy / z
    J[:, 1, 2] = -fy * y / z ** 2
    return J @ R


def tangent_frame(n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two (N, 3) unit tangents orthogonal to unit normals n (N, 3) and to each other."""
    helper = np.where(np.abs(n[:, :1]) < 0.9, [[1.0, 0.0, 0.0]], [[0.0, 1.0, 0.0]])
    t1 = np.cross(n, helper)
    t1 /= np.maximum(np.linalg.norm(t1, axis=1, keepdims=True), 1e-12)
    return t1, np.cross(n, t1)


@dataclass
class AlignmentEvidence:
    """Per working texel (flat, D*D)."""

    misplacement: np.ndarray   # (D*D,) float32 RMS over views of the local field, scene units; NaN unseen
    offset: np.ndarray         # (D*D,) float32 least-squares offset along the normal, scene units; NaN if unsolved
    significant: np.ndarray    # (D*D,) bool: offset at least `z` standard errors from 0, from >= 3 views
    global_px: dict[str, float]  # per view: median |d| px removed as a calibration-like shift


def normal_system(J: np.ndarray, n: np.ndarray) -> np.ndarray:
    """(N, 2, 3) image motion per unit offset along [n, t1, t2] (the unknowns of one texel)."""
    t1, t2 = tangent_frame(n)
    B = np.stack([n, t1, t2], axis=2)      # (N, 3, 3) columns
    return J @ B


def alignment_evidence(obs: list, grid_pos: np.ndarray, grid_nrm: np.ndarray, n_texels: int, *,
                       remove_global: bool, ridge: float, z: float = 3.0,
                       sigma_floor_px: float = 0.05) -> AlignmentEvidence | None:
    """Fields of all views that have one, back-projected to the working texels.

    obs: Observations (featuretex.diagnose.observe); grid_pos, grid_nrm: (D*D, 3) float64 texel
    positions and unit normals. `ridge` (relative to the system's scale) damps tangential slips.
    The offset's standard error is that of weighted least squares, sigma0^2 (A^-1)_nn with sigma0^2
    the residual variance per unit weight (RSS / (2 views - 3)), floored at sigma_floor_px.
    """
    users = [o for o in obs if o.correction is not None and o.correction.field is not None]
    if not users:
        return None
    sq = np.zeros(n_texels)
    wsum = np.zeros(n_texels)
    A = np.zeros((n_texels, 3, 3))
    b = np.zeros((n_texels, 3))
    dd = np.zeros(n_texels)
    nv = np.zeros(n_texels)
    gl: dict[str, float] = {}
    for o in users:
        cam = o.view.camera
        d = field_at(o.correction.field, o.xy, cam.width, cam.height).astype(np.float64)
        med = np.median(d, axis=0) if remove_global else np.zeros(2)
        gl[o.view.name] = float(np.linalg.norm(med))
        d = d - med
        lateral = d * o.depth[:, None] / np.array([[cam.fx, cam.fy]])   # px -> scene units (pinhole)
        w = o.cos.astype(np.float64)
        sq[o.idx] += w * (lateral ** 2).sum(1)
        wsum[o.idx] += w
        pc = o.view.to_camera(grid_pos[o.idx])
        G = normal_system(projection_jacobian(o.view.R, pc, cam.fx, cam.fy), grid_nrm[o.idx])  # (N, 2, 3)
        A[o.idx] += w[:, None, None] * np.einsum("nki,nkj->nij", G, G)
        b[o.idx] += w[:, None] * np.einsum("nki,nk->ni", G, d)
        dd[o.idx] += w * (d * d).sum(1)
        nv[o.idx] += 1
    seen = wsum > 0
    mis = np.full(n_texels, np.nan)
    mis[seen] = np.sqrt(sq[seen] / wsum[seen])
    offset = np.full(n_texels, np.nan)
    significant = np.zeros(n_texels, bool)
    ok = seen & (np.linalg.det(A) > 0)
    if ok.any():
        Ak, bk = A[ok], b[ok]
        scale = np.trace(Ak, axis1=1, axis2=2)[:, None, None] / 3.0
        reg = Ak + ridge * scale * np.diag([0.0, 1.0, 1.0])[None] + 1e-9 * scale * np.eye(3)[None]
        inv = np.linalg.inv(reg)
        sol = np.einsum("nij,nj->ni", inv, bk)
        rss = np.maximum(dd[ok] - 2 * np.einsum("ni,ni->n", sol, bk) + np.einsum("ni,nij,nj->n", sol, Ak, sol), 0)
        dof = np.maximum(2 * nv[ok] - 3, 1)
        sigma2 = np.maximum(rss / dof, sigma_floor_px ** 2 * wsum[ok] / np.maximum(nv[ok], 1))
        se = np.sqrt(sigma2 * np.maximum(inv[:, 0, 0], 0))
        # an offset counts only where views from different directions constrain it
        cond = _normal_information(Ak) / np.maximum(scale[:, 0, 0], 1e-30)
        keep = cond > 0.02
        idx = np.flatnonzero(ok)
        offset[idx[keep]] = sol[keep, 0]
        significant[idx] = keep & (nv[ok] >= 3) & (np.abs(sol[:, 0]) >= z * se)
    return AlignmentEvidence(misplacement=mis.astype(np.float32), offset=offset.astype(np.float32),
                             significant=significant, global_px=gl)


def _normal_information(A: np.ndarray) -> np.ndarray:
    """(N,) information on the normal unknown once the tangential ones are eliminated (Schur
    complement A_nn - A_nt A_tt^-1 A_tn), px^2 per scene unit^2."""
    Att = A[:, 1:, 1:] + 1e-12 * np.eye(2)[None]
    Atn = A[:, 1:, :1]
    return A[:, 0, 0] - (np.transpose(Atn, (0, 2, 1)) @ np.linalg.solve(Att, Atn))[:, 0, 0]
