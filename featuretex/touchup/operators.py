"""Sparse operators of a triangle mesh for the offset solve: welding of UV-seam copies, the
per-face gradient of a piecewise-linear function, the cotangent and uniform Laplacians.

A scan mesh is split along its UV seams (one UV per vertex), so the copies of a seam vertex are
welded into one unknown: the surface must not tear where the texture layout is cut.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp


def weld(vertices: np.ndarray, decimals: int = 9) -> tuple[np.ndarray, int]:
    """(inverse (V,) int64 welded index of each vertex, number of welded vertices): vertices at the
    same position (rounded to `decimals`) share one index, as the mesh's smooth normals do."""
    _, inv = np.unique(np.round(vertices, decimals), axis=0, return_inverse=True)
    inv = inv.ravel().astype(np.int64)
    return inv, int(inv.max()) + 1 if len(inv) else 0


def face_areas(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(F,) float64 triangle areas, scene units^2."""
    t = vertices[faces]
    return 0.5 * np.linalg.norm(np.cross(t[:, 1] - t[:, 0], t[:, 2] - t[:, 0]), axis=1)


def gradient(vertices: np.ndarray, faces: np.ndarray) -> sp.csr_matrix:
    """(3F, V) sparse: rows 3f..3f+2 give the (constant) gradient on face f of the piecewise-linear
    function with values x at the vertices: grad = sum_i x_i (n x e_i) / (2 A), e_i the edge
    opposite vertex i, counter-clockwise (the hat functions' gradients)."""
    t = vertices[faces]
    n = np.cross(t[:, 1] - t[:, 0], t[:, 2] - t[:, 0])
    a2 = np.linalg.norm(n, axis=1)
    ok = a2 > 1e-30
    n = np.where(ok[:, None], n / np.where(ok, a2, 1.0)[:, None], 0.0)
    F = len(faces)
    rows, cols, vals = [], [], []
    for i in range(3):
        e = t[:, (i + 2) % 3] - t[:, (i + 1) % 3]                   # edge opposite vertex i
        g = np.where(ok[:, None], np.cross(n, e) / np.where(ok, a2, 1.0)[:, None], 0.0)
        for c in range(3):
            rows.append(3 * np.arange(F) + c)
            cols.append(faces[:, i])
            vals.append(g[:, c])
    return sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                         shape=(3 * F, len(vertices)))


def cotangent_laplacian(vertices: np.ndarray, faces: np.ndarray) -> sp.csr_matrix:
    """(V, V) symmetric positive semi-definite stiffness matrix: x^T L x = integral of |grad x|^2
    over the surface; off-diagonal L_ij = -(cot a_ij + cot b_ij) / 2 over the angles opposite
    edge ij (the cotangent formula)."""
    t = vertices[faces]
    rows, cols, vals = [], [], []
    for i in range(3):
        j, k = (i + 1) % 3, (i + 2) % 3
        u, v = t[:, j] - t[:, i], t[:, k] - t[:, i]                # the angle at vertex i faces edge jk
        cross = np.linalg.norm(np.cross(u, v), axis=1)
        cot = np.einsum("ij,ij->i", u, v) / np.maximum(cross, 1e-30)
        w = 0.5 * cot
        rows += [faces[:, j], faces[:, k]]
        cols += [faces[:, k], faces[:, j]]
        vals += [-w, -w]
    V = len(vertices)
    off = sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(V, V))
    return (off - sp.diags(np.asarray(off.sum(axis=1)).ravel())).tocsr()


def uniform_laplacian(faces: np.ndarray, n_vertices: int) -> sp.csr_matrix:
    """(V, V) graph Laplacian of the edges: degree on the diagonal, -1 per neighbour."""
    e = np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]])
    e = np.unique(np.sort(e, axis=1), axis=0)
    A = sp.csr_matrix((np.ones(2 * len(e)), (np.concatenate([e[:, 0], e[:, 1]]), np.concatenate([e[:, 1], e[:, 0]]))),
                      shape=(n_vertices, n_vertices))
    A.data[:] = 1.0
    return (sp.diags(np.asarray(A.sum(axis=1)).ravel()) - A).tocsr()


def vertex_areas(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(V,) float64 a third of the area of the faces around each vertex (barycentric cells)."""
    out = np.zeros(len(vertices))
    a = face_areas(vertices, faces) / 3.0
    for i in range(3):
        np.add.at(out, faces[:, i], a)
    return out
