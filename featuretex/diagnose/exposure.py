"""Exposure: how open a surface point is to the outside (the share of its hemisphere of directions
along which a ray escapes the mesh). Unphotographed surface deep in a cavity (the inside of a jug)
is not a reason to rescan: no camera outside the object could see it well."""

from __future__ import annotations

import numpy as np

from featuretex.scene.mesh import SceneMesh


def hemisphere_directions(n: int) -> np.ndarray:
    """(n, 3) unit directions spread evenly over the upper (+z) hemisphere (a Fibonacci spiral)."""
    k = np.arange(n) + 0.5
    z = 1.0 - k / n                      # uniform in z = uniform in solid angle on a hemisphere
    phi = k * np.pi * (3.0 - np.sqrt(5.0))
    r = np.sqrt(np.maximum(1.0 - z * z, 0.0))
    return np.stack([r * np.cos(phi), r * np.sin(phi), z], axis=1)


def exposure(mesh: SceneMesh, pos: np.ndarray, nrm: np.ndarray, rays: int = 32) -> np.ndarray:
    """(N,) float32 in 0..1: the fraction of `rays` hemisphere directions around each normal along
    which a ray from the point (N, 3) leaves the mesh without hitting it (Embree)."""
    if len(pos) == 0:
        return np.zeros(0, np.float32)
    from embreex import mesh_construction, rtcore_scene

    scene = rtcore_scene.EmbreeScene()
    mesh_construction.TriangleMesh(scene, mesh.vertices[mesh.faces].astype(np.float32))
    local = hemisphere_directions(rays)
    t1 = np.cross(nrm, np.where(np.abs(nrm[:, :1]) < 0.9, [[1.0, 0, 0]], [[0, 1.0, 0]]))
    t1 /= np.maximum(np.linalg.norm(t1, axis=1, keepdims=True), 1e-12)
    t2 = np.cross(nrm, t1)
    dirs = (local[None, :, :1] * t1[:, None] + local[None, :, 1:2] * t2[:, None]
            + local[None, :, 2:] * nrm[:, None])                       # (N, rays, 3)
    eps = 1e-4 * mesh.extent
    origins = np.repeat(pos + eps * nrm, rays, axis=0)
    hit = scene.run(origins.astype(np.float32), dirs.reshape(-1, 3).astype(np.float32), output=0)
    return (np.asarray(hit).reshape(len(pos), rays) < 0).mean(axis=1).astype(np.float32)
