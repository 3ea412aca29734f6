"""The G-buffer of one view, stored compactly (16 bytes/pixel) and expanded on demand.

Stored per pixel centre: triangle id (int32, -1 = background), barycentrics (b1, b2) of the
triangle's vertices 1 and 2 (float32; b0 = 1 - b1 - b2), depth = camera-space z (float32, scene
units). UV, world position and normals are exact interpolations from these and the mesh.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from featuretex.scene.mesh import SceneMesh

GBUFFER_DTYPE = np.dtype([("tri", "<i4"), ("b1", "<f4"), ("b2", "<f4"), ("depth", "<f4")])


@dataclass
class GBuffer:
    """Buffers of one view. `data` may be a read-only memory map of the on-disk cache."""

    view: str
    data: np.ndarray  # (H, W) GBUFFER_DTYPE

    @property
    def shape(self) -> tuple[int, int]:
        return self.data.shape  # (H, W)

    @property
    def tri(self) -> np.ndarray:
        """(H, W) int32 triangle id, -1 where no surface."""
        return self.data["tri"]

    @property
    def coverage(self) -> np.ndarray:
        """(H, W) bool, True where a triangle covers the pixel centre."""
        return self.data["tri"] >= 0

    @property
    def depth(self) -> np.ndarray:
        """(H, W) float32 camera-space z, scene units; 0 where no surface."""
        return self.data["depth"]

    @property
    def bary(self) -> np.ndarray:
        """(H, W, 3) float32 barycentric weights of the triangle's three vertices."""
        b1, b2 = self.data["b1"], self.data["b2"]
        return np.stack([1.0 - b1 - b2, b1, b2], axis=-1).astype(np.float32)

    def interpolate(self, mesh: SceneMesh, attr: np.ndarray, fill: float = 0.0) -> np.ndarray:
        """Interpolate a per-vertex attribute (V, K) -> (H, W, K) float32; `fill` off the surface."""
        return interpolate(self.tri, self.data["b1"], self.data["b2"], mesh.faces, attr, fill)

    def uv(self, mesh: SceneMesh) -> np.ndarray:
        """(H, W, 2) float32 texture coords (v up)."""
        return self.interpolate(mesh, mesh.uv)

    def position(self, mesh: SceneMesh) -> np.ndarray:
        """(H, W, 3) float32 world position, scene units."""
        return self.interpolate(mesh, mesh.vertices)

    def normal(self, mesh: SceneMesh) -> np.ndarray:
        """(H, W, 3) float32 interpolated (shading) unit normal."""
        n = self.interpolate(mesh, mesh.normals)
        return n / np.maximum(np.linalg.norm(n, axis=-1, keepdims=True), 1e-12)

    def geometric_normal(self, mesh: SceneMesh) -> np.ndarray:
        """(H, W, 3) float32 unit face normal of the triangle at each pixel."""
        fn = mesh.face_normals.astype(np.float32)
        out = np.zeros(self.shape + (3,), np.float32)
        cov = self.coverage
        out[cov] = fn[self.tri[cov]]
        return out


def interpolate(tri: np.ndarray, b1: np.ndarray, b2: np.ndarray, faces: np.ndarray, attr: np.ndarray,
                fill: float = 0.0) -> np.ndarray:
    """Barycentric interpolation of per-vertex `attr` (V, K) at ids `tri` (...,) -> (..., K) float32."""
    attr = np.asarray(attr)
    out = np.full(tri.shape + (attr.shape[1],), fill, np.float32)
    m = tri >= 0
    t = tri[m]
    f = faces[t]
    w1 = b1[m][:, None].astype(np.float64)
    w2 = b2[m][:, None].astype(np.float64)
    out[m] = (attr[f[:, 0]] * (1 - w1 - w2) + attr[f[:, 1]] * w1 + attr[f[:, 2]] * w2).astype(np.float32)
    return out
