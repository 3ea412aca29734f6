"""Measuring the scan against the true jug: per-face signed error along the normals and the faces
each defect touches (the demo's ground truth)."""

from __future__ import annotations

import numpy as np
import trimesh

from featuretex.demo.geometry import BAND_Z
from featuretex.demo.scan import sector_weight


def _face_frames(v: np.ndarray, f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Centroids (F, 3) and unit outward normals (F, 3) of triangles."""
    tri = v[f]
    n = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    return tri.mean(axis=1), n / np.linalg.norm(n, axis=1, keepdims=True)


def closest_distance(points: np.ndarray, normals: np.ndarray, true_mesh: trimesh.Trimesh,
                     upper: np.ndarray) -> np.ndarray:
    """(N,) meters from each point to the nearest true triangle facing like its normal (n . n_true >
    0.3, so the far side of a thin wall does not count), searched up to `upper` (N,); inf beyond.

    Exact point-triangle distances (trimesh.triangles.closest_point). A triangle can only be nearer
    than `upper` if its centre is within upper + its circumradius, so triangles are searched in
    tiers of circumradius to keep the candidate lists short.
    """
    from scipy.spatial import cKDTree

    tris, fn, centres = true_mesh.triangles, true_mesh.face_normals, true_mesh.triangles_center
    circ = np.linalg.norm(tris - centres[:, None], axis=2).max(axis=1)
    out = np.full(len(points), np.inf)
    for lo, hi in ((0.0, 0.0015), (0.0015, 0.003), (0.003, np.inf)):
        tier = np.flatnonzero((circ > lo) & (circ <= hi))
        if len(tier) == 0:
            continue
        lists = cKDTree(centres[tier]).query_ball_point(points, r=upper + circ[tier].max())
        owner = np.repeat(np.arange(len(points)), [len(c) for c in lists])
        cand = tier[np.concatenate([np.asarray(c, np.int64) for c in lists])]
        keep = np.einsum("ij,ij->i", fn[cand], normals[owner]) > 0.3
        owner, cand = owner[keep], cand[keep]
        d = np.linalg.norm(trimesh.triangles.closest_point(tris[cand], points[owner]) - points[owner], axis=1)
        np.minimum.at(out, owner, d)
    out[out > upper] = np.inf
    return out


def face_error(scan_v: np.ndarray, scan_f: np.ndarray, true_mesh: trimesh.Trimesh,
               reach: float = 0.015) -> np.ndarray:
    """(F,) float64 meters per scan face: t such that centroid + t * n lies on the true surface (n = the
    face's unit outward normal). Positive = the true surface is outside the scan (the scan is sunk in, as in a dent).
    Hits on true faces facing away from n (the far side of a thin wall) are ignored. NaN where it is
    undefined: no true surface within `reach` along the normal, or the hit lies much farther than
    the nearest true surface (|t| > 1.5 x that distance + 0.2 mm: the normal grazes a step or an edge).
    """
    cen, n = _face_frames(scan_v, scan_f)
    origins = cen - reach * n
    locs, ray_idx, tri_idx = true_mesh.ray.intersects_location(origins, n, multiple_hits=True)
    t = np.einsum("ij,ij->i", locs - origins[ray_idx], n[ray_idx]) - reach
    facing = np.einsum("ij,ij->i", true_mesh.face_normals[tri_idx], n[ray_idx]) > 0.3
    ok = facing & (np.abs(t) <= reach)
    err = np.full(len(scan_f), np.nan)
    best = np.full(len(scan_f), np.inf)
    for r, tt in zip(ray_idx[ok], t[ok]):
        if abs(tt) < best[r]:
            best[r] = abs(tt)
            err[r] = tt
    # the hit itself is a facing surface point, so the nearest one is at most |t| away; only faces
    # with |t| > 0.2 mm can fail the test
    check = np.flatnonzero(np.abs(err) > 0.0002)
    dist = closest_distance(cen[check], n[check], true_mesh, upper=np.abs(err[check]) + 1e-9)
    grazing = np.abs(err[check]) > 1.5 * dist + 0.0002
    err[check[grazing]] = np.nan
    return err


def defect_faces(scan_v: np.ndarray, scan_f: np.ndarray, info: dict) -> dict[str, list[int]]:
    """Scan face ids touched by each defect (centroid inside the dent / smoothed sector / hole rim)."""
    cen, fn = _face_frames(scan_v, scan_f)
    d = info["dent"]
    dent_ids = np.flatnonzero((np.linalg.norm(cen - d["centre"], axis=1) < d["radius"]) & (fn @ d["normal"] > 0.5))
    theta = np.arctan2(cen[:, 1], cen[:, 0])
    radial = np.stack([np.cos(theta), np.sin(theta), np.zeros_like(theta)], 1)
    on_band = (cen[:, 2] > BAND_Z[0]) & (cen[:, 2] < BAND_Z[1]) & (np.einsum("ij,ij->i", fn, radial) > 0.5)
    smooth_ids = np.flatnonzero(on_band & (sector_weight(theta) > 0.5))
    # rim of the hole: faces with an edge used once (boundary) near the hole centre
    edges = np.sort(np.concatenate([scan_f[:, [0, 1]], scan_f[:, [1, 2]], scan_f[:, [2, 0]]]), axis=1)
    _, inv, counts = np.unique(edges, axis=0, return_inverse=True, return_counts=True)
    boundary = (counts[inv.ravel()] == 1).reshape(3, -1).any(axis=0)
    h = info["hole"]
    hole_ids = np.flatnonzero(boundary & (np.linalg.norm(cen - h["centre"], axis=1) < 3 * h["radius"]))
    return {"dent": dent_ids.tolist(), "smoothed_detail": smooth_ids.tolist(), "hole": hole_ids.tolist()}


# Painting the albedo
