"""Turntable preview of the exported model: frames rendered with pyrender (headless EGL, unlit, as a
glTF viewer shows KHR_materials_unlit) and an animated PNG of them.

The model is shown exactly as a glTF viewer loads it (node transforms applied): the camera orbits
its bounding sphere about glTF's +Y (up) at a fixed elevation and distance, starting from glTF's
+Z (the front of an asset), so the whole model stays in view and a model that is not upright in
the file is not upright here either. Camera poses follow pyrender/OpenGL: camera looks down its
-z axis, +y up.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import trimesh
from PIL import Image

from featuretex.atomic import atomic_path

os.environ.setdefault("PYOPENGL_PLATFORM", "egl")


@dataclass(frozen=True)
class Orbit:
    """Where the turntable camera is for each frame."""

    poses: list[np.ndarray]   # per frame (4, 4) float64 camera-to-world, OpenGL camera axes
    yfov: float               # vertical field of view, radians
    znear: float              # scene units
    zfar: float


def _unit(v: np.ndarray) -> np.ndarray:
    return v / max(float(np.linalg.norm(v)), 1e-12)


def orbit(centre: np.ndarray, radius: float, up: np.ndarray, frames: int, *, elevation_deg: float = 20.0,
          yfov_deg: float = 30.0, front: np.ndarray | None = None, margin: float = 1.05) -> Orbit:
    """Camera poses circling a sphere (centre (3,), radius, scene units) about `up`, far enough for
    the whole sphere to stay in view.

    `front`: world direction from the object to the first frame's camera (projected onto the
    horizontal plane); any horizontal direction when None.
    """
    up = _unit(np.asarray(up, np.float64))
    centre = np.asarray(centre, np.float64)
    radius = float(radius) or 1.0
    yfov = math.radians(yfov_deg)
    dist = margin * radius / math.sin(yfov / 2)
    f = np.asarray(front, np.float64) if front is not None else np.array([1.0, 0.0, 0.0])
    h = f - up * (f @ up)
    if np.linalg.norm(h) < 1e-6:                       # front is along up: take any perpendicular
        h = np.cross(up, [1.0, 0.0, 0.0] if abs(up[0]) < 0.9 else [0.0, 1.0, 0.0])
    h = _unit(h)
    side = np.cross(up, h)
    el = math.radians(elevation_deg)
    poses = []
    for k in range(frames):
        a = 2 * math.pi * k / frames
        back = _unit(math.cos(el) * (math.cos(a) * h + math.sin(a) * side) + math.sin(el) * up)  # +z of camera
        right = _unit(np.cross(up, back))
        cam_up = np.cross(back, right)
        pose = np.eye(4)
        pose[:3, 0], pose[:3, 1], pose[:3, 2] = right, cam_up, back
        pose[:3, 3] = centre + dist * back
        poses.append(pose)
    return Orbit(poses, yfov, max(dist - radius * 1.5, dist * 1e-3), dist + radius * 1.5)


def load_model(glb: Path) -> trimesh.Scene:
    return trimesh.load(str(glb), force="scene")


def bounding_sphere(model: trimesh.Scene) -> tuple[np.ndarray, float]:
    """(centre (3,), radius) scene units: the bounding-box centre and the farthest vertex from it
    (tighter than half the box diagonal, so the model fills the frame)."""
    pts = [trimesh.transform_points(model.geometry[g].vertices, T)
           for T, g in (model.graph[n] for n in model.graph.nodes_geometry)]
    v = np.concatenate(pts) if pts else np.zeros((1, 3))
    centre = 0.5 * (v.min(axis=0) + v.max(axis=0))
    return centre, float(np.linalg.norm(v - centre, axis=1).max())


def render_frames(model: trimesh.Scene, cams: Orbit, size: int) -> list[np.ndarray]:
    """Per pose an (size, size, 4) uint8 RGBA frame: the base-colour texture as stored (sRGB bytes,
    unlit), transparent background."""
    import pyrender

    scene = pyrender.Scene(bg_color=[0.0, 0.0, 0.0, 0.0], ambient_light=[1.0, 1.0, 1.0])
    for node_name in model.graph.nodes_geometry:
        transform, geom_name = model.graph[node_name]
        scene.add(pyrender.Mesh.from_trimesh(model.geometry[geom_name], smooth=False), pose=transform)
    camera = pyrender.PerspectiveCamera(yfov=cams.yfov, aspectRatio=1.0, znear=cams.znear, zfar=cams.zfar)
    cam_node = scene.add(camera, pose=cams.poses[0])
    renderer = pyrender.OffscreenRenderer(size, size)
    flags = pyrender.RenderFlags.FLAT | pyrender.RenderFlags.RGBA
    frames = []
    try:
        for pose in cams.poses:
            scene.set_pose(cam_node, pose)
            colour, _ = renderer.render(scene, flags=flags)
            frames.append(np.asarray(colour, np.uint8).copy())
    finally:
        renderer.delete()
    return frames


def write_animation(path: Path, frames: list[np.ndarray], seconds_per_turn: float = 4.0) -> Path:
    """Animated PNG (loops forever) of RGBA frames, written atomically."""
    ims = [Image.fromarray(f, "RGBA") for f in frames]
    ms = max(20, round(1000 * seconds_per_turn / max(len(ims), 1)))
    with atomic_path(path) as tmp:
        ims[0].save(tmp, format="PNG", save_all=True, append_images=ims[1:], duration=ms, loop=0,
                    disposal=1, blend=0)
    return path


GLTF_UP = np.array([0.0, 1.0, 0.0])
GLTF_FRONT = np.array([0.0, 0.0, 1.0])


def turntable(glb: Path, out: Path, *, frames: int = 36, size: int = 360) -> list[np.ndarray]:
    """Render `frames` views of `glb` as loaded (glTF's +Y up, first frame from +Z), write them to
    `out` as an animated PNG and return them (each (size, size, 4) uint8 RGBA)."""
    model = load_model(glb)
    centre, radius = bounding_sphere(model)
    shots = render_frames(model, orbit(centre, radius, GLTF_UP, frames, front=GLTF_FRONT), size)
    write_animation(out, shots)
    return shots
