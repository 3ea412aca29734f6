"""The touch-up's offset solve and mesh operators on small meshes.

References: numpy.linalg.lstsq on the dense stacked least-squares system (with per-face gradients
solved here independently, from each triangle's own 3 x 3 linear system); the cotangent formula's
known properties (zero on constants, exact Dirichlet energy of linear functions on a flat patch:
integral |grad x|^2 = |g|^2 x area); trimesh's own subdivision, edge and watertightness checks.
"""

from __future__ import annotations

import numpy as np
import pytest
import trimesh

from featuretex.touchup.operators import cotangent_laplacian, face_areas, gradient, uniform_laplacian, weld
from featuretex.touchup.solve import Evidence, observation_matrix, solve_offsets


def small_mesh(seed: int = 0) -> trimesh.Trimesh:
    """A slightly irregular icosphere (162 vertices) so cotangent weights differ."""
    m = trimesh.creation.icosphere(subdivisions=2)
    rng = np.random.default_rng(seed)
    v = m.vertices * (1.0 + 0.03 * rng.normal(size=(len(m.vertices), 1)))
    return trimesh.Trimesh(v, m.faces, process=False)


def random_evidence(mesh: trimesh.Trimesh, n: int, seed: int) -> Evidence:
    rng = np.random.default_rng(seed)
    f = rng.integers(0, len(mesh.faces), n)
    b = rng.dirichlet([1, 1, 1], n)
    return Evidence(face=f, bary=b, target=rng.normal(0, 0.01, n), weight=rng.uniform(0.2, 1.0, n) * 1e-2)


def reference_gradient_rows(v: np.ndarray, f: np.ndarray) -> np.ndarray:
    """(3F, V) dense: per face, the gradient g of the linear interpolant solves
    [p1 - p0; p2 - p0; n] g = [x1 - x0; x2 - x0; 0] (tangent to the face)."""
    G = np.zeros((3 * len(f), len(v)))
    for k, (a, b, c) in enumerate(f):
        n = np.cross(v[b] - v[a], v[c] - v[a])
        M = np.stack([v[b] - v[a], v[c] - v[a], n / np.linalg.norm(n)])
        Minv = np.linalg.inv(M)                      # g = Minv @ [x_b - x_a, x_c - x_a, 0]
        G[3 * k:3 * k + 3, b] += Minv[:, 0]
        G[3 * k:3 * k + 3, c] += Minv[:, 1]
        G[3 * k:3 * k + 3, a] -= Minv[:, 0] + Minv[:, 1]
    return G


def test_gradient_matches_per_face_linear_solve():
    m = small_mesh()
    v, f = np.asarray(m.vertices), np.asarray(m.faces)
    np.testing.assert_allclose(gradient(v, f).toarray(), reference_gradient_rows(v, f), atol=1e-9)


def test_cotangent_laplacian_is_dirichlet_energy():
    m = small_mesh(1)
    v, f = np.asarray(m.vertices), np.asarray(m.faces)
    L = cotangent_laplacian(v, f)
    assert abs(L - L.T).max() < 1e-12
    np.testing.assert_allclose(L @ np.ones(len(v)), 0.0, atol=1e-10)     # constants cost nothing
    G = reference_gradient_rows(v, f)
    A = np.repeat(face_areas(v, f), 3)
    np.testing.assert_allclose(L.toarray(), G.T @ (A[:, None] * G), atol=1e-9)
    # flat patch, linear function x = g . p: energy = |g|^2 x area (exact for linear functions)
    xs, ys = np.meshgrid(np.linspace(0, 2, 7), np.linspace(0, 1, 5))
    pv = np.stack([xs.ravel(), ys.ravel(), np.zeros(xs.size)], 1)
    quads = [(r * 7 + c, r * 7 + c + 1, (r + 1) * 7 + c + 1, (r + 1) * 7 + c) for r in range(4) for c in range(6)]
    pf = np.array([t for a, b, c, d in quads for t in ((a, b, c), (a, c, d))])
    x = pv @ np.array([0.3, -0.7, 0.0])
    assert cotangent_laplacian(pv, pf) @ x @ x == pytest.approx((0.3 ** 2 + 0.7 ** 2) * 2.0, rel=1e-9)


@pytest.mark.parametrize("laplacian", ["cotangent", "uniform"])
def test_solve_matches_dense_lstsq(laplacian):
    """Without pins or robust weights the solve is the least-squares solution of the stacked
    system; numpy.linalg.lstsq on the dense rows is the reference."""
    m = small_mesh(2)
    v, f = np.asarray(m.vertices), np.asarray(m.faces)
    ev = random_evidence(m, 400, 3)
    length, eps = 0.15, 1e-3
    sol = solve_offsets(v, f, ev, np.zeros(len(v), bool), length=length, eps=eps, laplacian=laplacian)
    B = observation_matrix(f, ev, len(v)).toarray()
    from featuretex.touchup.operators import vertex_areas

    if laplacian == "cotangent":
        G = reference_gradient_rows(v, f)
        smooth = length * np.sqrt(np.repeat(face_areas(v, f), 3))[:, None] * G
    else:   # the uniform Laplacian as per-edge difference rows, scaled like the solver scales it
        U = uniform_laplacian(f, len(v)).toarray()
        L = cotangent_laplacian(v, f)
        s = L.diagonal().mean() / U.diagonal().mean()
        edges = np.argwhere(np.triu(U < 0))
        smooth = np.zeros((len(edges), len(v)))
        smooth[np.arange(len(edges)), edges[:, 0]] = 1.0
        smooth[np.arange(len(edges)), edges[:, 1]] = -1.0
        smooth *= length * np.sqrt(s)
    rows = np.vstack([np.sqrt(ev.weight)[:, None] * B, smooth, np.diag(np.sqrt(eps * vertex_areas(v, f)))])
    rhs = np.concatenate([np.sqrt(ev.weight) * ev.target, np.zeros(len(rows) - len(ev.target))])
    ref = np.linalg.lstsq(rows, rhs, rcond=None)[0]
    np.testing.assert_allclose(sol.offset, ref, rtol=1e-6, atol=1e-9 * np.abs(ref).max())


def test_pins_hold_and_limit_clips():
    m = small_mesh(3)
    v, f = np.asarray(m.vertices), np.asarray(m.faces)
    ev = random_evidence(m, 300, 4)
    ev.target[:] = 0.05
    pinned = v[:, 2] < 0
    sol = solve_offsets(v, f, ev, pinned, length=0.1, limit=0.03)
    assert np.all(sol.offset[pinned] == 0)
    assert np.abs(sol.offset).max() <= 0.03 + 1e-15
    assert sol.offset[v[:, 2] > 0.5].min() > 0.02        # far from the pins the data wins


def test_robust_weights_reject_an_outlier_patch():
    """Evidence: 0.02 everywhere, except 5 % of texels at -0.2 (a false match); plain least squares
    is dragged towards the outliers, Cauchy IRLS stays near 0.02."""
    m = small_mesh(4)
    v, f = np.asarray(m.vertices), np.asarray(m.faces)
    ev = random_evidence(m, 2000, 5)
    ev.weight[:] = 1e-2
    ev.target[:] = 0.02
    rng = np.random.default_rng(0)
    bad = rng.random(len(ev.target)) < 0.05
    ev.target[bad] = -0.2
    plain = solve_offsets(v, f, ev, np.zeros(len(v), bool), length=0.05)
    robust = solve_offsets(v, f, ev, np.zeros(len(v), bool), length=0.05, robust_scale=0.01, iterations=5)
    assert np.median(np.abs(robust.offset - 0.02)) < 0.3 * np.median(np.abs(plain.offset - 0.02))
    assert robust.weight[bad].mean() < 0.1


def test_weld_joins_seam_copies():
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 0, 0], [0, 1, 0]], float)
    inv, n = weld(v)
    assert n == 3 and inv[0] == inv[2] and len(set(inv[[0, 1, 3]])) == 3
