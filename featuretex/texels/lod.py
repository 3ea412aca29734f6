"""Screen-space UV derivatives per pixel, for mip level-of-detail selection.

The derivative d(uv)/d(pixel) is computed analytically from each pixel's triangle (its plane in
camera space and its affine UV map) rather than by differencing neighbouring pixels: neighbours
across a UV seam or a silhouette would otherwise report a huge footprint and blur the texture.
The level of detail then follows the usual rule for isotropic mipmapping (OpenGL 4.6 core
specification, section 8.14.1, "scale factor" rho = max of the two derivative lengths; recalled
from memory): lambda = log2(rho * T) for a T x T texture.
"""

from __future__ import annotations

import numpy as np

from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.manifest import View
from featuretex.scene.mesh import SceneMesh

MAX_FOOTPRINT = 1.0  # uv units per pixel; beyond this a pixel sees the whole texture anyway


def face_uv_gradients(mesh: SceneMesh) -> np.ndarray:
    """(F, 2, 3) float64: d(u, v)/d(world position) on each face (in the face plane), per scene unit.

    Minimum-norm solution of G @ E = D with E = [p1 - p0, p2 - p0] (3 x 2) and D the UV edges
    (2 x 2), i.e. G = D (E^T E)^-1 E^T. Degenerate faces get G = 0.
    """
    tri = mesh.vertices[mesh.faces]                      # (F, 3, 3)
    uvt = mesh.uv[mesh.faces]                            # (F, 3, 2)
    E = np.stack([tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]], axis=2)   # (F, 3, 2)
    D = np.stack([uvt[:, 1] - uvt[:, 0], uvt[:, 2] - uvt[:, 0]], axis=2)   # (F, 2, 2)
    EtE = np.einsum("fki,fkj->fij", E, E)                # (F, 2, 2)
    det = EtE[:, 0, 0] * EtE[:, 1, 1] - EtE[:, 0, 1] * EtE[:, 1, 0]
    ok = np.abs(det) > 1e-30
    inv = np.zeros_like(EtE)
    inv[ok, 0, 0] = EtE[ok, 1, 1] / det[ok]
    inv[ok, 1, 1] = EtE[ok, 0, 0] / det[ok]
    inv[ok, 0, 1] = -EtE[ok, 0, 1] / det[ok]
    inv[ok, 1, 0] = -EtE[ok, 1, 0] / det[ok]
    return np.einsum("fij,fjk,flk->fil", D, inv, E)      # (F, 2, 3)


def uv_jacobian(gbuf: GBuffer, mesh: SceneMesh, view: View, grads: np.ndarray | None = None) -> np.ndarray:
    """(H, W, 2, 2) float32: [d(u,v)/dx, d(u,v)/dy] per pixel (columns = pixel axes), 0 off the mesh."""
    grads = face_uv_gradients(mesh) if grads is None else grads
    H, W = gbuf.shape
    out = np.zeros((H, W, 2, 2), np.float32)
    cov = np.asarray(gbuf.coverage)
    if not cov.any():
        return out
    ys, xs = np.nonzero(cov)
    tri = np.asarray(gbuf.tri)[ys, xs]
    out[ys, xs] = pixel_uv_jacobian(grads[tri], mesh.face_normals[tri], np.asarray(gbuf.depth)[ys, xs], xs, ys, view)
    return out


def pixel_uv_jacobian(G: np.ndarray, normal: np.ndarray, depth: np.ndarray, xs: np.ndarray, ys: np.ndarray,
                      view: View) -> np.ndarray:
    """(N, 2, 2) float32 [d(u,v)/dx, d(u,v)/dy] at N surface pixels, from each pixel's triangle:
    G (N, 2, 3) float64 d(u,v)/d(world position) (face_uv_gradients), `normal` (N, 3) unit face
    normal (world), `depth` (N,) camera z, scene units, and ABSOLUTE pixel coords `xs`, `ys` (N,)
    of the full image (the ray depends on them through cx, cy: a crop passes its offset added).

    For the pixel ray r = ((x - cx)/fx, (y - cy)/fy, 1) meeting the triangle plane n.X = c at
    X = z r, dX/dx = z dr/dx - r z (n . dr/dx) / (n . r), in camera axes; with Gc = G R^T the uv
    gradient in camera axes, d(uv)/dx = Gc dX/dx = (z / fx) Gc[:, 0] - (Gc r) z n_x / (fx n . r).
    Lens distortion changes the local pixel scale by a few percent at most and is ignored here
    (only the filter width depends on it).
    """
    z = depth.astype(np.float64)
    cam = view.camera
    R = view.R
    r = np.stack([(xs - cam.cx) / cam.fx, (ys - cam.cy) / cam.fy, np.ones_like(z)], axis=1)
    n_cam = normal @ R.T                                  # (N, 3) face normal in camera axes
    nr = np.einsum("ij,ij->i", n_cam, r)
    nr = np.where(np.abs(nr) < 1e-6, np.copysign(1e-6, nr), nr)  # grazing: bounded below
    Gc = (np.reshape(G, (-1, 3)) @ R.T).reshape(-1, 2, 3)  # one flat product: batched 3x3 ones are slow
    Gr = np.einsum("nij,nj->ni", Gc, r)
    J = np.empty((len(z), 2, 2))
    for axis, f in ((0, cam.fx), (1, cam.fy)):
        J[:, :, axis] = Gc[:, :, axis] * (z / f)[:, None] - Gr * (z * n_cam[:, axis] / f / nr)[:, None]
    return J.astype(np.float32)


def footprint_of(J: np.ndarray) -> np.ndarray:
    """(...,) float32 rho of Jacobians J (..., 2, 2): the larger column length, capped."""
    sq = J * J
    rho = np.sqrt(np.maximum(sq[..., 0, 0] + sq[..., 1, 0], sq[..., 0, 1] + sq[..., 1, 1]))
    return np.minimum(rho, MAX_FOOTPRINT).astype(np.float32)


def uv_footprint(gbuf: GBuffer, mesh: SceneMesh, view: View, grads: np.ndarray | None = None) -> np.ndarray:
    """(H, W) float32 rho: the larger of |d(uv)/dx| and |d(uv)/dy|, uv units per pixel; 0 off the mesh.

    Multiply by the texture size T for texels per pixel; lambda = log2(rho * T) is the mip level.
    """
    return footprint_of(uv_jacobian(gbuf, mesh, view, grads))
