"""Mesh loading through trimesh, with an automatic xatlas UV atlas when the mesh has none.

UV convention (stated once, used everywhere): `uv[:, 0]` = u grows to the right of the texture
image, `uv[:, 1]` = v grows **upwards** (OBJ and trimesh convention): v = 0 is the bottom row of
the image. Texel (row i, column j) of a T x T texture has its centre at
u = (j + 0.5) / T, v = 1 - (i + 0.5) / T. The glTF exporter flips v as glTF requires.
"""

from __future__ import annotations

import hashlib
import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import trimesh

from featuretex.errors import input_error

log = logging.getLogger("featuretex")


@dataclass(frozen=True)
class SceneMesh:
    """A triangle mesh with one UV per vertex (vertices are split along UV seams)."""

    vertices: np.ndarray = field(repr=False)   # (V, 3) float64, scene units
    faces: np.ndarray = field(repr=False)      # (F, 3) int64
    uv: np.ndarray = field(repr=False)         # (V, 2) float64, v up (see module doc)
    normals: np.ndarray = field(repr=False)    # (V, 3) float64 unit, smooth across UV seams
    uv_generated: bool = False                 # True when featuretex made the atlas

    @property
    def face_normals(self) -> np.ndarray:
        """(F, 3) float64 unit geometric normals (right-hand winding)."""
        tri = self.vertices[self.faces]
        n = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
        return n / np.maximum(np.linalg.norm(n, axis=1, keepdims=True), 1e-30)

    @property
    def extent(self) -> float:
        """Diagonal of the bounding box, scene units."""
        return float(np.linalg.norm(self.vertices.max(0) - self.vertices.min(0)))

    def to_trimesh(self) -> trimesh.Trimesh:
        return trimesh.Trimesh(self.vertices, self.faces, process=False)

    def content_key(self) -> str:
        h = hashlib.sha256()
        for a in (self.vertices, self.faces, self.uv):
            h.update(np.ascontiguousarray(a).tobytes())
        return h.hexdigest()[:16]


def smooth_normals(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(V, 3) area-weighted vertex normals, shared by vertices at the same position (UV seams)."""
    tri = vertices[faces]
    fn = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])  # length = 2 * area
    _, inv = np.unique(np.round(vertices, 9), axis=0, return_inverse=True)
    inv = inv.ravel()
    acc = np.zeros((inv.max() + 1, 3))
    for k in range(3):
        np.add.at(acc, inv[faces[:, k]], fn)
    n = acc[inv]
    return n / np.maximum(np.linalg.norm(n, axis=1, keepdims=True), 1e-30)


def load_mesh(path: Path, manifest_file: str, *, atlas_resolution: int = 1024) -> SceneMesh:
    """Load a mesh; triangulate; keep its UVs or make an xatlas atlas. Raises InputError."""
    try:
        loaded = trimesh.load(str(path), process=False, force="mesh")
    except Exception as e:  # trimesh raises many types for broken files
        what = " ".join(str(e).split())[:200] or type(e).__name__
        raise input_error(manifest_file, f"cannot read mesh '{path.name}': {what}", field="mesh",
                          hint="the file is damaged, truncated or not a mesh format trimesh reads") from None
    if not isinstance(loaded, trimesh.Trimesh) or len(loaded.faces) == 0:
        raise input_error(manifest_file, f"mesh '{path.name}' has no faces", field="mesh",
                          hint="a point cloud cannot be textured; mesh it first (or the file is truncated)")
    v = np.asarray(loaded.vertices, dtype=np.float64)
    f = np.asarray(loaded.faces, dtype=np.int64)
    if not np.all(np.isfinite(v)):
        raise input_error(manifest_file, f"mesh '{path.name}' has NaN or infinite vertex coordinates",
                          field="mesh", hint="clean the mesh in your modelling tool")
    # drop degenerate (zero-area) and repeated faces: they carry no surface
    area2 = np.linalg.norm(np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]]), axis=1)
    keep = area2 > 1e-14 * max(1.0, float(np.abs(v).max()) ** 2)
    _, first = np.unique(np.sort(f, axis=1), axis=0, return_index=True)
    uniq = np.zeros(len(f), bool)
    uniq[first] = True
    if not keep.all() or not uniq.all():
        log.warning("%s: mesh '%s': ignoring %d zero-area and %d repeated face(s) of %d", manifest_file,
                    path.name, int((~keep).sum()), int((keep & ~uniq).sum()), len(f))
    f = f[keep & uniq]
    if len(f) == 0:
        raise input_error(manifest_file, f"mesh '{path.name}' has only zero-area faces", field="mesh",
                          hint="the mesh has no surface to put a texture on")
    uv = None
    vis = getattr(loaded, "visual", None)
    if vis is not None and getattr(vis, "uv", None) is not None and len(vis.uv) == len(v):
        uv = np.asarray(vis.uv, dtype=np.float64)
        if not np.all(np.isfinite(uv)):
            raise input_error(manifest_file, f"mesh '{path.name}' has NaN or infinite UVs", field="mesh",
                              hint="remove the UVs to let featuretex make an atlas")
        if uv.min() < -1e-6 or uv.max() > 1 + 1e-6:
            raise input_error(manifest_file, f"mesh '{path.name}' has UVs outside [0, 1] "
                              f"(range {uv.min():.3g}..{uv.max():.3g}); tiled UVs cannot be baked",
                              field="mesh", hint="repack the UVs into [0, 1], or remove them for an automatic atlas")
        _check_uv_area(uv, f, manifest_file, path.name)
    used = np.unique(f)
    generated = False
    if uv is None:
        v, f, uv = make_atlas(v[used], _reindex(f, used), atlas_resolution)
        generated = True
    return SceneMesh(vertices=v, faces=f, uv=uv, normals=smooth_normals(v, f), uv_generated=generated)


MIN_UV_AREA = 1e-9   # of the unit square: less than a thousandth of one texel of a 1024 texture


def _check_uv_area(uv: np.ndarray, faces: np.ndarray, manifest_file: str, name: str) -> None:
    """UVs that cover no area (all equal, or all on a line) give every face one texel or none."""
    t = uv[faces]                                                            # (F, 3, 2)
    a, b = t[:, 1] - t[:, 0], t[:, 2] - t[:, 0]
    area = 0.5 * np.abs(a[:, 0] * b[:, 1] - a[:, 1] * b[:, 0]).sum()
    if not area > MIN_UV_AREA:
        raise input_error(manifest_file, f"mesh '{name}' has UVs that cover no area of the texture (total "
                          f"{area:.2g} of the unit square: every face maps to a point or a line)", field="mesh",
                          hint="remove the UVs to let featuretex make an atlas, or unwrap the mesh again")


def _reindex(f: np.ndarray, used: np.ndarray) -> np.ndarray:
    remap = np.full(used.max() + 1, -1, np.int64)
    remap[used] = np.arange(len(used))
    return remap[f]


def make_atlas(vertices: np.ndarray, faces: np.ndarray, resolution: int = 1024
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """xatlas chart + pack. Returns split vertices (V', 3), faces (F, 3), uv (V', 2) with v up."""
    import xatlas

    atlas = xatlas.Atlas()
    atlas.add_mesh(vertices.astype(np.float32), faces.astype(np.uint32))
    pack = xatlas.PackOptions()
    pack.resolution = resolution
    pack.padding = max(4, resolution // 128)  # room for the gutter (common practice: >= 4 texels)
    pack.bilinear = True
    atlas.generate(pack_options=pack)
    vmap, new_faces, uv = atlas[0]
    # xatlas packs into [0, 1]^2; the layout is ours, so its coordinates are taken as v-up as they are
    uv = np.asarray(uv, dtype=np.float64)
    return vertices[vmap].astype(np.float64), new_faces.astype(np.int64), uv
