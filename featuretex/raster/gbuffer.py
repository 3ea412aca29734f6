"""The G-buffer of one view, stored compactly (16 bytes/pixel) and expanded on demand.

Stored per pixel centre: triangle id (int32, -1 = background), barycentrics (b1, b2) of the
triangle's vertices 1 and 2 (float32; b0 = 1 - b1 - b2), depth = camera-space z (float32, scene
units). UV, world position and normals are exact interpolations from these and the mesh.
"""

from __future__ import annotations

import mmap
import os
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

    def window(self, rows: slice, cols: slice) -> "GBuffer":
        """An in-memory copy of the crop data[rows, cols] (unit-step slices inside the image).

        A memory-mapped cache file is read with pread instead of through the mapping: mapped pages
        a process has touched count towards its resident set, so reading crop after crop of every
        view through the maps would make the fit's RSS grow by all views' G-buffers.
        """
        r0, r1, _ = rows.indices(self.shape[0])
        c0, c1, _ = cols.indices(self.shape[1])
        return GBuffer(self.view, read_window(self.data, r0, r1, c0, c1))

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


def _mapped_file(data: np.ndarray) -> tuple[str, int] | None:
    """(file name, byte offset of data[0, 0]) if `data` is a whole C-ordered memory-mapped array
    (np.load(..., mmap_mode="r") of a .npy file), else None (slices of a map carry the parent's offset)."""
    if isinstance(data, np.memmap) and isinstance(data.base, mmap.mmap) and data.filename \
            and data.flags.c_contiguous and data.ndim == 2:
        return data.filename, int(data.offset)
    return None


def read_window(data: np.ndarray, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
    """(r1 - r0, c1 - c0) copy of data[r0:r1, c0:c1]; memory-mapped files are read, not mapped in.

    Whole rows are read in one call: a system call per row costs about as much as copying 2000
    extra pixels of it (measured), so narrower reads only pay off for images far wider than 2048.
    """
    src = _mapped_file(data)
    if src is None:
        return np.array(data[r0:r1, c0:c1])
    W, isz = data.shape[1], data.dtype.itemsize
    rows = np.empty((max(r1 - r0, 0), W), data.dtype)
    if rows.size:
        fd = os.open(src[0], os.O_RDONLY)
        try:
            _pread_into(fd, memoryview(rows.view(np.uint8).reshape(-1)), src[1] + r0 * W * isz)
        finally:
            os.close(fd)
    return rows if (c0, c1) == (0, W) else np.ascontiguousarray(rows[:, c0:c1])


def _pread_into(fd: int, buf: memoryview, offset: int) -> None:
    done = 0
    while done < len(buf):
        n = os.preadv(fd, [buf[done:]], offset + done)
        if n <= 0:
            raise OSError(f"G-buffer file ended early at byte {offset + done}")
        done += n
