"""The touched-up mesh: the scan's vertices moved along their normals; faces and UVs as they were."""

from __future__ import annotations

import dataclasses

import numpy as np

from featuretex.scene.mesh import SceneMesh, smooth_normals
from featuretex.touchup.operators import weld


@dataclasses.dataclass
class Welded:
    """The mesh with UV-seam copies joined: the unknowns of the solve."""

    inverse: np.ndarray    # (V,) int64 welded index of each mesh vertex
    vertices: np.ndarray   # (Vw, 3) float64
    faces: np.ndarray      # (F, 3) int64 into the welded vertices
    normals: np.ndarray    # (Vw, 3) float64 unit (the mesh's smooth normals)


def welded(mesh: SceneMesh) -> Welded:
    inv, n = weld(mesh.vertices)
    v = np.zeros((n, 3))
    nrm = np.zeros((n, 3))
    v[inv] = mesh.vertices
    nrm[inv] = mesh.normals
    return Welded(inverse=inv, vertices=v, faces=inv[mesh.faces], normals=nrm)


def moved(mesh: SceneMesh, w: Welded, offset: np.ndarray) -> SceneMesh:
    """`mesh` with every vertex moved by offset (Vw,) scene units along its welded normal; faces,
    UVs and the vertex order are kept, normals recomputed."""
    v = mesh.vertices + (offset[:, None] * w.normals)[w.inverse]
    return dataclasses.replace(mesh, vertices=v, normals=smooth_normals(v, mesh.faces))
