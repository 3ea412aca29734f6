"""Still pictures of the delivered model: orthographic views ray cast with Embree at pixel centres,
painted with any texture in the model's UV layout (the error map, or the delivered texture).

Directions are in model.glb's glTF frame (+Y up, +Z the front), so the stills show the model the
way any glTF viewer orients it. Each still is cast at twice its size and averaged 2 x 2 (smooth
silhouettes); what a pixel shows (triangle, UV) is kept at the cast resolution, so a region's
visible pixels can be counted exactly.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.mesh import SceneMesh
from featuretex.texels.sampling import sample_texture

BACKGROUND = (243, 242, 238)     # sRGB bytes behind the model
# (name, direction from the model towards the camera, the picture's up), glTF frame
SIX_VIEWS: tuple[tuple[str, tuple[float, float, float], tuple[float, float, float]], ...] = (
    ("front", (0.0, 0.0, 1.0), (0.0, 1.0, 0.0)),
    ("right side", (1.0, 0.0, 0.0), (0.0, 1.0, 0.0)),
    ("back", (0.0, 0.0, -1.0), (0.0, 1.0, 0.0)),
    ("left side", (-1.0, 0.0, 0.0), (0.0, 1.0, 0.0)),
    ("top", (0.0, 1.0, 0.0), (0.0, 0.0, -1.0)),
    ("bottom", (0.0, -1.0, 0.0), (0.0, 0.0, 1.0)),
)


@dataclass
class Model:
    """model.glb's mesh with where it sits in the glTF frame."""

    mesh: SceneMesh            # vertex data as stored (scene frame and unit)
    to_gltf: np.ndarray        # (4, 4) scene frame -> glTF frame (metres, +Y up)
    centre: np.ndarray         # (3,) bounding-box centre, glTF frame
    radius: float              # farthest vertex from the centre, glTF units
    half: float                # half the bounding box's longest side, glTF units (frames axis views)


@dataclass
class Cast:
    """What each pixel of one view shows, at the cast resolution (twice the still's)."""

    tri: np.ndarray            # (2S, 2S) int32 triangle id, -1 background
    uv: np.ndarray             # (2S, 2S, 2) float32, v up (0 on background)
    facing: np.ndarray         # (2S, 2S) float32 |cos| between the face normal and the view ray


def load_model(glb: Path) -> Model:
    """model.glb's first mesh primitive, its frame, and its bounding sphere in the glTF frame."""
    from featuretex.export.gltf import read_glb_mesh

    mesh, to_gltf = read_glb_mesh(glb)
    v = mesh.vertices @ to_gltf[:3, :3].T + to_gltf[:3, 3]
    centre = 0.5 * (v.min(axis=0) + v.max(axis=0))
    radius = float(np.linalg.norm(v - centre, axis=1).max()) or 1.0
    return Model(mesh, to_gltf, centre, radius, float(np.abs(v - centre).max()) or radius)


def _unit(v) -> np.ndarray:
    v = np.asarray(v, np.float64)
    return v / max(float(np.linalg.norm(v)), 1e-12)


class Caster:
    """Orthographic ray casting of one model (the Embree scene is built once)."""

    def __init__(self, model: Model):
        from featuretex.raster.embree import EmbreeRasteriser

        self.model = model
        self._embree = EmbreeRasteriser(model.mesh)
        self._from_gltf = np.linalg.inv(model.to_gltf)
        n = model.mesh.face_normals @ np.linalg.inv(model.to_gltf[:3, :3])   # normals: inverse transpose
        self._normals = n / np.maximum(np.linalg.norm(n, axis=1, keepdims=True), 1e-12)

    def cast(self, towards, up, size: int, margin: float = 1.04, half: float | None = None) -> Cast:
        """Rays at the centres of a (2 size)^2 grid covering the bounding sphere (or a square of
        side 2 `half` about the centre) x `margin`, looking from `towards` (glTF frame) at the
        centre, `up` towards the top of the picture."""
        m = self.model
        back = _unit(towards)
        right = _unit(np.cross(up, back))
        top = np.cross(back, right)
        n = 2 * size
        half = margin * (m.radius if half is None else half)
        t = ((np.arange(n) + 0.5) / n * 2.0 - 1.0) * half
        x, y = np.meshgrid(t, -t)                                  # row 0 at the top
        origins = m.centre + x[..., None] * right + y[..., None] * top + 2.0 * m.radius * back
        A, b = self._from_gltf[:3, :3], self._from_gltf[:3, 3]
        o = origins.reshape(-1, 3) @ A.T + b
        d = np.broadcast_to(A @ -back, o.shape)
        hits = self._embree.cast(o, d).reshape(n, n)
        g = GBuffer("still", hits)
        facing = np.zeros((n, n), np.float32)
        cov = g.coverage
        facing[cov] = np.abs(self._normals[g.tri[cov]] @ back)
        return Cast(g.tri.copy(), g.uv(m.mesh), facing)


    def first_hits(self, origins: np.ndarray, dirs: np.ndarray) -> np.ndarray:
        """(N, 3) scene-frame points where rays (N, 3 origins and directions, scene frame) first meet
        the model; NaN rows for rays that miss."""
        hits = self._embree.cast(origins, dirs)
        pts = np.asarray(origins, np.float64) + np.asarray(dirs, np.float64) * hits["depth"][:, None]
        pts[hits["tri"] < 0] = np.nan
        return pts


def texel_at(uv: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """(row, col) int64 of the texel holding each UV (..., 2) on a size x size grid, v up."""
    col = np.clip((uv[..., 0] * size).astype(np.int64), 0, size - 1)
    row = np.clip(((1.0 - uv[..., 1]) * size).astype(np.int64), 0, size - 1)
    return row, col


def paint(cast: Cast, texture: np.ndarray, *, nearest: bool, shading: float = 0.0) -> np.ndarray:
    """(S, S, 3) uint8 still: `texture` (T, T, 3) uint8 sRGB at each pixel's UV (nearest texel or
    bilinear), darkened by `shading` (0 = unlit; 0.3 = up to 30 % where the surface turns away from
    the camera), averaged 2 x 2 over the background colour."""
    hit = cast.tri >= 0
    rgb = np.empty(cast.tri.shape + (3,), np.float32)
    rgb[:] = BACKGROUND
    if nearest:
        r, c = texel_at(cast.uv[hit], texture.shape[0])
        col = texture[r, c].astype(np.float32)
    else:
        col = sample_texture(texture.astype(np.float32), cast.uv[hit])
    rgb[hit] = col * (1.0 - shading * (1.0 - cast.facing[hit]))[:, None]
    n = rgb.shape[0] // 2
    out = rgb.reshape(n, 2, n, 2, 3).mean(axis=(1, 3))
    return np.clip(np.rint(out), 0, 255).astype(np.uint8)


def lookup(cast: Cast, ids: np.ndarray) -> np.ndarray:
    """(2S, 2S) int32: the value of the (T, T) int map `ids` at each pixel's texel (0 on background)."""
    out = np.zeros(cast.tri.shape, np.int32)
    hit = cast.tri >= 0
    r, c = texel_at(cast.uv[hit], ids.shape[0])
    out[hit] = ids[r, c]
    return out


def three_quarter(azimuth_deg: float = 35.0, elevation_deg: float = 20.0) -> tuple[np.ndarray, np.ndarray]:
    """(towards, up) for a view from the front-right and a little above (glTF frame)."""
    a, e = math.radians(azimuth_deg), math.radians(elevation_deg)
    return np.array([math.sin(a) * math.cos(e), math.sin(e), math.cos(a) * math.cos(e)]), np.array([0.0, 1.0, 0.0])
