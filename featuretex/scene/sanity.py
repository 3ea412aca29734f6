"""Checks that catch a scene which is valid file by file but cannot be right as a whole, before any
expensive stage runs: poses read the wrong way round or in the other camera axes, a mesh in another
unit than the poses, a focal length that cannot be in pixels, inverted masks, photos that are their
masks.

Evidence against most views stops the run (InputError: one line naming file, view and field, with
the likely fix). Evidence against a few views only is suspicious - a bad mask, a view that missed -
and becomes a warning: logged, listed in summary.json and in the report.
"""

from __future__ import annotations

import dataclasses
import logging
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from featuretex import plugins
from featuretex.errors import input_error
from featuretex.scene.manifest import AXES, Manifest, View, invert_rigid
from featuretex.scene.mesh import SceneMesh

log = logging.getLogger("featuretex")

SAMPLE_VERTICES = 5000     # vertices tested against each camera (a subsample of large meshes)
COARSE_SIDE = 128          # longer side of the coarse silhouettes compared with the masks, pixels
AREA_FACTOR = 4.0          # projected mesh area vs mask area: beyond this factor either way, suspicious
DOT = 2e-4                 # a mesh covering less than this share of the image projects to a dot
MAJORITY = 0.5             # evidence against more than this share of the views stops the run
CLUSTER = 0.01             # camera centres within this share of the mesh size count as one point
TWO_LEVEL = 0.99           # share of pure black or white pixels that makes an image a mask
MASK_LIKE_IOU = 0.7        # a black-and-white photo whose white overlaps the mesh this well is a mask
SILHOUETTE_BACKEND = "embree"  # rasteriser plugin of the coarse silhouettes (exact ray casting, no GPU)


@dataclass(frozen=True)
class Finding:
    """One view's evidence of one kind."""

    kind: str          # what went wrong, same for the same cause in every view
    view: str
    field: str
    what: str          # the view's own figures
    hint: str          # the likely fix


def _sample(mesh: SceneMesh) -> np.ndarray:
    return mesh.vertices[:: max(1, len(mesh.vertices) // SAMPLE_VERTICES)]


def _sees(w2c: np.ndarray, view: View, pts: np.ndarray) -> tuple[bool, bool]:
    """(some point in front, some point in front projects into the image) for a pose."""
    pc = np.einsum("nk,jk->nj", pts, w2c[:3, :3]) + w2c[:3, 3]
    front = pc[:, 2] > 1e-9
    if not front.any():
        return False, False
    px = view.camera.project(pc[front])
    cam = view.camera
    inside = (px[:, 0] > -0.5) & (px[:, 0] < cam.width - 0.5) & (px[:, 1] > -0.5) & (px[:, 1] < cam.height - 0.5)
    return True, bool(inside.any())


def _other_axes(view: View) -> str:
    return "opengl" if view.camera.axes == "opencv" else "opencv"


def _other_key(view: View) -> str:
    return "camera_to_world" if view.pose_key == "world_to_camera" else "world_to_camera"


def _readings(view: View) -> dict[str, np.ndarray]:
    """The view's pose read in each other way scene.yaml could have meant it -> world_to_camera:
    in the other camera axes, as the other of world_to_camera/camera_to_world, or both."""
    as_written = AXES[view.camera.axes] @ view.world_to_camera     # the pose in the file's own axes
    return {"axes": AXES[_other_axes(view)] @ as_written,
            "key": AXES[view.camera.axes] @ invert_rigid(as_written),
            "both": AXES[_other_axes(view)] @ invert_rigid(as_written)}


def _reading_hint(reading: str, view: View) -> str:
    axes = f"'axes: {_other_axes(view)}' in camera '{view.camera.id}'"
    key = f"these matrices under '{_other_key(view)}' instead of '{view.pose_key}'"
    fix = {"axes": f"write {axes}", "key": f"write {key}", "both": f"write {key}, and {axes}"}[reading]
    return f"read that way every camera sees the mesh: {fix}"


def check_poses_see_mesh(man: Manifest, mesh: SceneMesh) -> None:
    """Every camera has the mesh in front of it and partly inside its image; when one does not, say
    whether the poses read in the other camera axes or the other way round would fix every view."""
    pts = _sample(mesh)
    seen = [_sees(v.world_to_camera, v, pts) for v in man.views]
    bad = [(v, s) for v, s in zip(man.views, seen) if not s[1]]
    if not bad:
        return
    view, (front, _) = bad[0]
    hint = "check the pose, and that the mesh and the poses use the same unit"
    if not front:
        hint = (f"{view.pose_key} maps world to camera coordinates with the camera looking along +z; "
                "check the pose" if view.pose_key == "world_to_camera" else
                f"{view.pose_key} places the camera in the world; check the pose")
    for reading in ("axes", "key", "both"):
        if all(_sees(_readings(v)[reading], v, pts)[1] for v in man.views):
            hint = _reading_hint(reading, view)
            break
    what = ("the mesh lies entirely behind this camera" if not front
            else "no part of the mesh projects into this image (camera looks away)")
    more = f"; so do {len(bad) - 1} more of the {len(man.views)} views" if len(bad) > 1 else ""
    raise input_error(str(man.path), what + more, view=view.name, field=view.pose_key, hint=hint)


def check_centres_spread(man: Manifest, mesh: SceneMesh) -> None:
    """Camera centres that all fall on one point, while the poses read the other way round spread
    around the mesh: the poses were written inverted (a camera-to-world matrix given as
    world_to_camera sends every camera that looks at the object to about the same place)."""
    if len(man.views) < 3:
        return
    size = mesh.extent
    centres = np.stack([v.centre for v in man.views])
    other_way = np.stack([invert_rigid(_readings(v)["key"])[:3, 3] for v in man.views])
    spread = float(np.linalg.norm(centres - centres.mean(0), axis=1).max())
    spread_other = float(np.linalg.norm(other_way - other_way.mean(0), axis=1).max())
    if spread < CLUSTER * size and spread_other > 10 * CLUSTER * size:
        v = man.views[0]
        raise input_error(str(man.path), f"all {len(man.views)} camera centres fall on one point (within "
                          f"{spread:.3g} {man.unit}); the poses look inverted", view=v.name, field=v.pose_key,
                          hint=f"write these matrices under '{_other_key(v)}' instead of '{v.pose_key}'")


def coarse_view(view: View, side: int = COARSE_SIDE) -> View:
    """The view with a camera of at most `side` pixels along its longer side, same field of view.

    Pixel centres sit at integers, so a pixel edge at -0.5 stays at -0.5: c' = (c + 0.5) s - 0.5.
    """
    cam = view.camera
    k = min(1.0, side / max(cam.width, cam.height))
    w, h = max(1, round(cam.width * k)), max(1, round(cam.height * k))
    sx, sy = w / cam.width, h / cam.height
    small = dataclasses.replace(cam, width=w, height=h, fx=cam.fx * sx, fy=cam.fy * sy,
                                cx=(cam.cx + 0.5) * sx - 0.5, cy=(cam.cy + 0.5) * sy - 0.5)
    return dataclasses.replace(view, camera=small)


def coarse_mask(view: View, mask: np.ndarray) -> np.ndarray:
    """(H, W) bool -> (h, w) float32 share of object pixels in each pixel of `coarse_view(view)`."""
    import cv2

    small = coarse_view(view).camera
    return cv2.resize(mask.astype(np.float32), (small.width, small.height), interpolation=cv2.INTER_AREA)


def _iou(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.minimum(a, b).sum() / max(np.maximum(a, b).sum(), 1e-9))


def _border(a: np.ndarray) -> float:
    """Mean of an (h, w) image over its outermost rows and columns."""
    return float(np.concatenate([a[0], a[-1], a[1:-1, 0], a[1:-1, -1]]).mean())


def looks_inverted(cover: np.ndarray, mask: np.ndarray) -> bool:
    """The mask marks the background: its white surrounds the photo's border where the mesh does not
    reach, and its black matches the mesh better than its white does."""
    c = cover.astype(np.float32)
    return (_border(mask) > 0.5 > _border(c)) and _iou(c, 1 - mask) > _iou(c, mask) + 0.2


IMAGE_HINT = "'image' must name the photo; does the image list point at the mask files?"


def silhouette_finding(view: View, cover: np.ndarray, mask: np.ndarray | None, unit: str,
                       light: np.ndarray | None = None) -> Finding | None:
    """Compare one view's coarse mesh silhouette (h, w) bool with its coarse mask (h, w) float 0..1;
    without a mask, with the coarse light pixels (h, w) float 0..1 of a photo that holds only black
    and white (`two_level_light`), if it is one."""
    area = float(cover.mean())
    if mask is None and light is not None and _iou(cover.astype(np.float32), light) > MASK_LIKE_IOU:
        return Finding("mask_as_photo", view.name, "image", "the photo is black and white only, white where "
                       "the mesh is: it looks like a mask", IMAGE_HINT)
    if mask is None:
        if area < DOT:
            return Finding("dot", view.name, view.pose_key, f"the mesh covers {100 * area:.2g}% of the photo",
                           "is fx a focal length in millimetres (write focal_mm and sensor_width_mm), or are the "
                           f"mesh and the poses in different units (both must be in '{unit}')?")
        return None
    m_area = float(mask.mean())
    if looks_inverted(cover, mask):
        return Finding("inverted", view.name, "mask", f"the mask covers {100 * m_area:.0f}% of the photo, "
                       f"mostly where the mesh is not", "white marks the object: invert the masks")
    figures = f"the mesh covers {100 * area:.2g}% of the photo, its mask {100 * m_area:.2g}%"
    if area * AREA_FACTOR < m_area:
        return Finding("small", view.name, view.pose_key, figures,
                       "is fx a focal length in millimetres (write focal_mm and sensor_width_mm), or are the "
                       f"mesh and the poses in different units (both must be in '{unit}')?")
    if area > AREA_FACTOR * m_area:
        return Finding("large", view.name, view.pose_key, figures,
                       f"are the mesh and the poses in different units (both must be in '{unit}'), or is the "
                       "focal length too long?")
    return None


def two_level_light(levels: np.ndarray) -> np.ndarray | None:
    """(H, W, C) uint8/uint16 code values -> (H, W) bool light pixels when the image holds only black
    and white (at least TWO_LEVEL of its pixels), as a mask does and no photo of an object does; else None."""
    top = np.iinfo(levels.dtype).max
    grey = levels[..., :3].mean(axis=2) if levels.shape[2] >= 3 else levels[..., 0].astype(np.float64)
    if np.mean((grey == 0) | (grey == top)) < TWO_LEVEL:
        return None
    return grey >= top / 2


def photo_is_mask(levels: np.ndarray, mask: np.ndarray) -> bool:
    """A two-level photo whose light pixels are its mask's object: the image names the mask file."""
    light = two_level_light(levels)
    return light is not None and bool(np.mean(light == mask) >= TWO_LEVEL)


def check_silhouettes(man: Manifest, mesh: SceneMesh, masks: dict[str, np.ndarray],
                      light: dict[str, np.ndarray] | None = None) -> list[str]:
    """Per view, the coarse mesh silhouette against the coarse mask (`coarse_mask`, by view name);
    a view without one against the light pixels of its photo when that is black and white only
    (`light`, coarse, by view name), else against a dot.

    Raises when more than MAJORITY of the views show the same kind of evidence; returns one warning
    line per view otherwise.
    """
    caster = plugins.load("rasterisers", SILHOUETTE_BACKEND)(mesh)
    light = light or {}
    findings = [silhouette_finding(v, caster.render(coarse_view(v))["tri"] >= 0, masks.get(v.name), man.unit,
                                   light.get(v.name)) for v in man.views]
    return settle([f for f in findings if f], len(man.views), len(masks), str(man.path))


def settle(findings: Sequence[Finding], n_views: int, n_masked: int, file: str) -> list[str]:
    """Stop on the kind of evidence most views share; the rest become warnings."""
    for kind in ("mask_as_photo", "inverted", "small", "large", "dot"):
        of_kind = [f for f in findings if f.kind == kind]
        pool = n_masked if kind in ("inverted", "small", "large") else n_views - n_masked
        if of_kind and len(of_kind) > MAJORITY * pool:
            f = of_kind[0]
            more = f"; {len(of_kind) - 1} more of {pool} views alike" if len(of_kind) > 1 else ""
            raise input_error(file, f"{f.what}{more}", view=f.view, field=f.field, hint=f.hint)
    return [f"view '{f.view}', field '{f.field}': {f.what} ({f.hint})" for f in findings]


def check_scene(man: Manifest, mesh: SceneMesh, masks: dict[str, np.ndarray],
                light: dict[str, np.ndarray] | None = None) -> list[str]:
    """Every check of this module, cheapest first (`masks`: coarse masks by view name, `coarse_mask`;
    `light`: the same of black-and-white-only photos of views without a mask, `two_level_light`).
    Raises InputError; returns warning lines."""
    check_poses_see_mesh(man, mesh)
    check_centres_spread(man, mesh)
    warnings = check_silhouettes(man, mesh, masks, light)
    for w in warnings:
        log.warning("%s: %s", man.path, w)
    return warnings

