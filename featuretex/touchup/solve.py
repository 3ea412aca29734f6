"""Per-vertex offsets along the normal from texel evidence: a sparse least-squares problem.

Unknowns: one offset x per welded vertex (scene units). Each evidence texel t lies in a face at
barycentrics b_t and says "the surface is d_t along the normal here", with weight w_t (its area
times its confidence). The offsets minimise

    sum_t w_t (b_t . x - d_t)^2  +  l^2 integral |grad x|^2  +  eps integral x^2

(data, membrane smoothness over the surface with the smoothing length l, and a faint pull to 0
that keeps vertices without any evidence nearby at rest), with pinned vertices held at 0. In
least-squares form the rows are [sqrt(w) B; l sqrt(A_f) G; sqrt(eps A_v) I]; the normal
equations' matrix B^T W B + l^2 L + eps M has the cotangent Laplacian L = G^T A_f G. Robust
weights: a few rounds of iteratively reweighted least squares with Cauchy weights on the data
residuals (a texel whose offset disagrees with its neighbours' is an outlier, not a bump).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from featuretex.touchup.operators import cotangent_laplacian, uniform_laplacian, vertex_areas


@dataclass
class Evidence:
    """Texel observations of the offset, on welded faces."""

    face: np.ndarray     # (M,) int64 welded face index of each observation
    bary: np.ndarray     # (M, 3) float64 barycentrics in that face
    target: np.ndarray   # (M,) float64 offset along the normal, scene units
    weight: np.ndarray   # (M,) float64 >= 0 (area x confidence)


@dataclass
class Solution:
    offset: np.ndarray   # (V,) float64 per welded vertex, scene units (0 where pinned)
    weight: np.ndarray   # (M,) float64 final robust weight of each observation (0..1)
    residual: np.ndarray  # (M,) float64 b . x - d per observation, scene units


def observation_matrix(faces: np.ndarray, ev: Evidence, n_vertices: int) -> sp.csr_matrix:
    """(M, V) sparse: row t holds the barycentrics of observation t at its face's vertices."""
    M = len(ev.face)
    rows = np.repeat(np.arange(M), 3)
    return sp.csr_matrix((ev.bary.ravel(), (rows, faces[ev.face].ravel())), shape=(M, n_vertices))


def smoothness(vertices: np.ndarray, faces: np.ndarray, kind: str) -> sp.csr_matrix:
    """(V, V) the smoothness term's matrix: the cotangent Laplacian (integral of |grad x|^2), or the
    uniform graph Laplacian scaled to the same units by the mean of the cotangent one's diagonal
    over its own (for meshes with poorly shaped triangles, where cotangents go negative)."""
    L = cotangent_laplacian(vertices, faces)
    if kind == "cotangent":
        return L
    if kind != "uniform":
        raise ValueError(f"unknown Laplacian {kind!r}")
    U = uniform_laplacian(faces, len(vertices))
    return (U * (float(L.diagonal().mean()) / max(float(U.diagonal().mean()), 1e-30))).tocsr()


def solve_offsets(vertices: np.ndarray, faces: np.ndarray, ev: Evidence, pinned: np.ndarray, *,
                  length: float, eps: float = 1e-3, laplacian: str = "cotangent", robust_scale: float = 0.0,
                  iterations: int = 3, limit: float = np.inf) -> Solution:
    """Offsets of the welded mesh (vertices (V, 3), faces (F, 3)); pinned: (V,) bool held at 0.
    length: smoothing length l, scene units; robust_scale: Cauchy scale c of the data residuals,
    scene units (0: plain least squares); limit: |offset| is clipped to this afterwards."""
    V = len(vertices)
    B = observation_matrix(faces, ev, V)
    K = (length ** 2) * smoothness(vertices, faces, laplacian) + sp.diags(eps * vertex_areas(vertices, faces))
    free = ~np.asarray(pinned, bool)
    x = np.zeros(V)
    robust = np.ones(len(ev.face))
    rounds = 1 + (iterations if robust_scale > 0 else 0)
    for k in range(rounds):
        w = ev.weight * robust
        if free.any():
            A = (B.T @ sp.diags(w) @ B + K).tocsc()[free][:, free]
            rhs = B.T @ (w * ev.target)
            x = np.zeros(V)
            x[free] = spla.spsolve(A.tocsc(), rhs[free])
        r = B @ x - ev.target
        if k + 1 < rounds:
            robust = 1.0 / (1.0 + (r / robust_scale) ** 2)
    return Solution(offset=np.clip(x, -limit, limit), weight=robust, residual=B @ x - ev.target)

