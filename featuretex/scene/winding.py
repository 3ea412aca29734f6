"""Which way the mesh's faces wind, judged from what the cameras see.

Normals follow the winding (right-hand rule), and shading, visibility and cavity tests take them
to point out of the object. Exporters often write a mesh inside out, with every face wound the
other way. The cameras tell: the surface a camera sees first faces it. So a sparse grid of rays
per view is cast through the camera model and, of the faces hit first, the share that face the
camera (normal against the ray) is measured. Mostly facing away: the mesh is inside out, and the
run works with its faces reversed (the outputs carry the outward winding). A sizeable share
facing away on a mesh that mostly faces the cameras means mixed winding: said, left as it is.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from featuretex.scene.manifest import View
from featuretex.scene.mesh import SceneMesh, smooth_normals

log = logging.getLogger("featuretex")
RAYS_PER_SIDE = 24          # per view: a 24 x 18 (or so) grid of pixel centres
MIXED_BELOW = 0.9           # facing share under this (and over a half) is called mixed winding


def facing_share(mesh: SceneMesh, views: Sequence[View]) -> tuple[float, int]:
    """(share of first hits whose face faces the camera, number of hits) over a ray grid per view."""
    import trimesh

    caster = trimesh.Trimesh(mesh.vertices, mesh.faces, process=False).ray
    normals = mesh.face_normals
    facing, hits = 0, 0
    for v in views:
        cam = v.camera
        step = max(cam.width, cam.height) / RAYS_PER_SIDE
        xs = np.arange(step / 2, cam.width, step)
        ys = np.arange(step / 2, cam.height, step)
        px = np.stack(np.meshgrid(xs - 0.5, ys - 0.5), -1).reshape(-1, 2)   # pixel (0, 0) is a centre
        dirs = np.einsum("nk,kj->nj", cam.unproject(px), v.R)               # world directions
        dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
        tri = caster.intersects_first(np.broadcast_to(v.centre, dirs.shape), dirs)
        hit = tri >= 0
        facing += int((np.einsum("nk,nk->n", normals[tri[hit]], dirs[hit]) < 0).sum())
        hits += int(hit.sum())
    return (facing / hits if hits else 1.0), hits


def orient_outward(mesh: SceneMesh, views: Sequence[View], file: str) -> tuple[SceneMesh, list[str]]:
    """The mesh with its faces wound outwards (reversed when the cameras see it inside out), and
    the warnings to show (one line each)."""
    share, hits = facing_share(mesh, views)
    if hits == 0 or share >= MIXED_BELOW:
        return mesh, []
    if share < 0.5:
        faces = np.ascontiguousarray(mesh.faces[:, ::-1])
        flipped = replace(mesh, faces=faces, normals=smooth_normals(mesh.vertices, faces))
        msg = (f"{file}: the mesh is inside out ({100 * (1 - share):.0f} % of the surface the cameras see faces "
               "away from them); working with its faces reversed, and the outputs carry the outward winding")
        log.warning(msg)
        return flipped, [msg]
    msg = (f"{file}: the mesh's winding is mixed ({100 * (1 - share):.0f} % of the surface the cameras see faces "
           "away from them); normals there point inwards, which can mislead the diagnosis")
    log.warning(msg)
    return mesh, [msg]
