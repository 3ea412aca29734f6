"""The texture-space buffer: for each texel centre, the triangle and surface point it maps to.

Found by casting rays in UV space (the UV layout as a flat mesh at z = 0), so the same exact
Embree code serves both screen and texture space.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from featuretex.raster.gbuffer import interpolate
from featuretex.scene.mesh import SceneMesh


@dataclass
class TexelBuffer:
    """Per-texel surface samples of a T x T texture (row 0 = top of the image, v = 1)."""

    size: int
    tri: np.ndarray        # (T, T) int32, -1 where the texel centre lies in no UV triangle
    b1: np.ndarray         # (T, T) float32
    b2: np.ndarray         # (T, T) float32
    position: np.ndarray   # (T, T, 3) float32 world position, scene units (0 where invalid)
    normal: np.ndarray     # (T, T, 3) float32 unit interpolated normal (0 where invalid)

    @property
    def valid(self) -> np.ndarray:
        """(T, T) bool: texel centre lies on the surface."""
        return self.tri >= 0


def texel_uv(size: int) -> np.ndarray:
    """(T, T, 2) float64 uv of every texel centre, v up: row i -> v = 1 - (i + 0.5) / T."""
    c = (np.arange(size) + 0.5) / size
    u, v = np.meshgrid(c, 1.0 - c)
    return np.stack([u, v], axis=-1)


def rasterise_uv(mesh: SceneMesh, size: int) -> TexelBuffer:
    """Rasterise the UV layout at texel centres (exact barycentrics via Embree)."""
    from embreex import mesh_construction, rtcore_scene

    flat = np.concatenate([mesh.uv, np.zeros((len(mesh.uv), 1))], axis=1)
    scene = rtcore_scene.EmbreeScene()
    mesh_construction.TriangleMesh(scene, flat[mesh.faces].astype(np.float32))
    uv = texel_uv(size).reshape(-1, 2)
    origins = np.concatenate([uv, np.ones((len(uv), 1))], axis=1).astype(np.float32)
    dirs = np.broadcast_to(np.array([0, 0, -1], np.float32), origins.shape).copy()
    r = scene.run(origins, dirs, output=1)
    tri = r["primID"].astype(np.int32).reshape(size, size)
    hit = tri >= 0
    b1 = np.where(hit, r["u"].reshape(size, size), 0).astype(np.float32)
    b2 = np.where(hit, r["v"].reshape(size, size), 0).astype(np.float32)
    pos = interpolate(tri, b1, b2, mesh.faces, mesh.vertices)
    nrm = interpolate(tri, b1, b2, mesh.faces, mesh.normals)
    nrm /= np.maximum(np.linalg.norm(nrm, axis=-1, keepdims=True), 1e-12)
    return TexelBuffer(size=size, tri=tri, b1=b1, b2=b2, position=pos, normal=nrm)
