"""Working resolution: per view, the part of the photo the run works on and the size it works at.

A 12-45 MP photo holds far more pixels than the texture can use. Per view the run decides:

* the texture size, from the photos' footprint on the surface (one texel per median photo pixel,
  a power of two within texture.min_size..max_size; `texture.size` when given). The footprint is
  measured on coarse G-buffers (longest side COARSE_SIDE), never on full-size ones;
* the reduction: about SAMPLES_PER_TEXEL_EDGE working pixels per texel edge of that texture
  (photos holding less than AUTO_MIN_FACTOR times that are kept as they are: a power-of-two
  texture size is within that factor of the photos' density anyway), never above the photo's own
  resolution;
  `photos.scale` fixes it and `photos.max_side` caps the working image's longest side;
* the crop: the box of the object (the mask's box joined with the box of the projected mesh, so
  the silhouette check still sees both outlines; the mesh alone without a mask) plus MARGIN_PX
  working pixels, inside the photo.

Photos are then reduced once, in linear light with an area filter (featuretex.scene.resample),
stored as PNG in `<run>/cache/photos/` under a name made from the photo's content and the window
(a re-run finds them; a changed photo gets a new name), and the scene is presented with working
views: each view's camera sees its working image exactly, its photo and mask are read from the
cache. Every later stage (G-buffers, fit, bake, diagnosis, scoring) works on these; memory and disk
follow the object's pixels at working resolution, not the sensor's.
"""

from __future__ import annotations

import dataclasses
import hashlib
import io
import json
import logging
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from featuretex import plugins
from featuretex.atomic import write_bytes
from featuretex.png import encode_texture_png
from featuretex.progress import progress_iter
from featuretex.scene.images import load_mask, load_photo_levels
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View, file_digest
from featuretex.scene.mesh import SceneMesh
from featuretex.scene.resample import Window, reduce_levels, reduce_mask, reduced_size, working_camera
from featuretex.settings import check_settings
from featuretex.stages import key_of
from featuretex.texels.size import auto_texture_size, depth_footprints, texel_edge
from featuretex.working_config import PhotoConfig

log = logging.getLogger("featuretex")

# Two samples per texel edge (the sampling theorem's rate for detail at the texel scale): at one,
# the area filter and the bake's bilinear look-ups blur twice and the texture loses detail the
# photos hold (benchmarks/capture.py measures both against full resolution).
SAMPLES_PER_TEXEL_EDGE = 2.0
AUTO_MIN_FACTOR = math.sqrt(2)  # reduction below which photos are kept at full size
MARGIN_PX = 64                  # working pixels kept around the object box (half a default fit crop)
COARSE_SIDE = 512               # longest side of the G-buffers that measure the footprint, pixels
FOOTPRINT_SAMPLES = 25_000      # covered coarse pixels per view that enter the texture size
CACHE_VERSION = "working-v1"


@dataclass(frozen=True)
class ViewPlan:
    window: Window
    footprint: float   # median scene units per photo pixel over the view's covered pixels (NaN: none)

    def summary(self) -> dict[str, Any]:
        w = self.window
        sx, sy = w.factors
        return {"scale": round(2.0 / (sx + sy), 4), "size": [w.width, w.height], "crop": w.box}


@dataclass(frozen=True)
class WorkingPlan:
    texture_size: int
    footprint: float                 # median photo pixel footprint of the fitted views, scene units
    views: dict[str, ViewPlan]

    def summary(self) -> dict[str, dict[str, Any]]:
        """{view: {"scale": working / photo size, "size": [w, h], "crop": [x0, y0, x1, y1]}} (photo pixels)."""
        return {name: p.summary() for name, p in self.views.items()}

    def to_json(self) -> dict[str, Any]:
        return {"texture_size": self.texture_size, "footprint": _finite(self.footprint),
                "views": {n: {**p.summary(), "footprint": _finite(p.footprint)} for n, p in self.views.items()}}

    @classmethod
    def from_json(cls, d: dict[str, Any]) -> "WorkingPlan":
        views = {n: ViewPlan(Window(*v["crop"], *v["size"]), _nan(v["footprint"])) for n, v in d["views"].items()}
        return cls(int(d["texture_size"]), _nan(d["footprint"]), views)


def _finite(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _nan(x: float | None) -> float:
    return float("nan") if x is None else float(x)


# --- deciding -----------------------------------------------------------------------------------

def coarse_depths(scene: Scene, backend: str) -> dict[str, np.ndarray]:
    """{view: (h, w) float32 camera depth (0 = no surface)} of every view at longest side <= COARSE_SIDE."""
    rasteriser = plugins.load("rasterisers", backend)(scene.mesh)
    out = {}
    for v in scene.views:
        cam = v.camera
        f = max(1.0, max(cam.width, cam.height) / COARSE_SIDE)
        win = Window(0, 0, cam.width, cam.height, *reduced_size((0, 0, cam.width, cam.height), f))
        out[v.name] = np.ascontiguousarray(rasteriser.render(dataclasses.replace(v, camera=working_camera(cam, win)))
                                           ["depth"])
    return out


def mesh_box(view: View, mesh: SceneMesh) -> tuple[int, int, int, int] | None:
    """[x0, y0, x1, y1] pixel box of the projected mesh inside the photo (the box of its projected
    vertices, one pixel wider each way), the whole photo when part of the mesh lies behind the
    camera, None when none of it lands in the photo."""
    cam = view.camera
    pc = view.to_camera(mesh.vertices)
    if (pc[:, 2] <= 1e-9).any():
        return 0, 0, cam.width, cam.height
    px = cam.project(pc)
    lo, hi = np.floor(px.min(0)) - 1, np.ceil(px.max(0)) + 2
    return _clip((int(lo[0]), int(lo[1]), int(hi[0]), int(hi[1])), cam.width, cam.height)


def mask_box(mask: np.ndarray) -> tuple[int, int, int, int] | None:
    """[x0, y0, x1, y1] box of a (H, W) bool mask's pixels, None when empty."""
    rows, cols = np.flatnonzero(mask.any(1)), np.flatnonzero(mask.any(0))
    if len(rows) == 0:
        return None
    return int(cols[0]), int(rows[0]), int(cols[-1]) + 1, int(rows[-1]) + 1


def _clip(box: tuple[int, int, int, int], w: int, h: int) -> tuple[int, int, int, int] | None:
    x0, y0, x1, y1 = max(box[0], 0), max(box[1], 0), min(box[2], w), min(box[3], h)
    return (x0, y0, x1, y1) if x0 < x1 and y0 < y1 else None


def _union(a: tuple[int, int, int, int] | None, b: tuple[int, int, int, int] | None):
    if a is None or b is None:
        return a or b
    return min(a[0], b[0]), min(a[1], b[1]), max(a[2], b[2]), max(a[3], b[3])


def view_window(view: View, box: tuple[int, int, int, int] | None, factor: float, max_side: int) -> Window:
    """The crop (object `box` plus MARGIN_PX working pixels; the whole photo for box None) and the
    working size at reduction `factor` >= 1, raised so the longest side is at most `max_side` (0: no cap)."""
    w, h = view.camera.width, view.camera.height

    def crop(f: float) -> tuple[int, int, int, int]:
        if box is None:
            return 0, 0, w, h
        m = int(math.ceil(MARGIN_PX * f))
        return _clip((box[0] - m, box[1] - m, box[2] + m, box[3] + m), w, h) or (0, 0, w, h)

    c = crop(factor)
    if max_side:
        for _ in range(2):     # a larger factor widens the margin in photo pixels
            longest = max(c[2] - c[0], c[3] - c[1])
            if longest / factor <= max_side:
                break
            factor = longest / max_side
            c = crop(factor)
        factor = max(factor, max(c[2] - c[0], c[3] - c[1]) / max_side)
    return Window(*c, *reduced_size(c, factor))


def plan_working(scene: Scene, photos: PhotoConfig, texture_size: int, min_size: int, max_size: int,
                 backend: str, *, quiet: bool = True) -> WorkingPlan:
    """Decide the texture size (`texture_size`, or automatic when 0) and every view's window."""
    check_settings(photos, "photos.")   # for callers of the stage itself; the command line checked already
    depths = coarse_depths(scene, backend)
    foot: dict[str, float] = {}
    pooled = []
    rng = np.random.default_rng(0)
    for v in scene.views:
        fp = depth_footprints(depths[v.name], 0.5 * (v.camera.fx + v.camera.fy), FOOTPRINT_SAMPLES, rng)
        foot[v.name] = float(np.median(fp)) if len(fp) else float("nan")
        if not v.holdout:
            pooled.append(fp)
    footprint = float(np.median(np.concatenate(pooled))) if pooled and sum(map(len, pooled)) else float("nan")
    size = texture_size or auto_texture_size(scene.mesh, footprint, min_size=min_size, max_size=max_size)
    edge = texel_edge(scene.mesh, size)
    views = {}
    for v in progress_iter(scene.views, desc="working size", unit="view", quiet=quiet):
        if photos.scale > 0:
            factor = 1.0 / photos.scale
        else:
            ratio = edge / foot[v.name]     # photo pixels per texel edge (NaN: the view misses the mesh)
            factor = ratio / SAMPLES_PER_TEXEL_EDGE
            factor = factor if factor > AUTO_MIN_FACTOR else 1.0
        box = None
        if photos.crop:
            mask = load_mask(v.mask, scene.file, v.name, (v.camera.width, v.camera.height))
            box = _union(mask_box(mask) if mask is not None else None, mesh_box(v, scene.mesh))
        views[v.name] = ViewPlan(view_window(v, box, factor, photos.max_side), foot[v.name])
    return WorkingPlan(size, footprint, views)


# --- reducing -----------------------------------------------------------------------------------

def _cache_name(*parts: Any) -> str:
    return hashlib.sha256(json.dumps([CACHE_VERSION, *parts]).encode()).hexdigest()[:24]


def _mask_png(mask: np.ndarray) -> bytes:
    from PIL import Image

    buf = io.BytesIO()
    Image.fromarray(np.where(mask, 255, 0).astype(np.uint8), "L").save(buf, format="PNG", compress_level=6)
    return buf.getvalue()


def working_view(scene: Scene, view: View, win: Window, cache_dir: Path) -> tuple[View, int]:
    """The view as the run works on it, its photo (and mask) reduced into `cache_dir` unless already
    there; -> (view, number of files written)."""
    cam = view.camera
    full = (cam.width, cam.height)
    written = 0
    image = cache_dir / f"{_cache_name(file_digest(view.image), win.box, win.width, win.height)}.png"
    if not image.is_file():
        levels = reduce_levels(load_photo_levels(view.image, scene.file, view.name, full), win)
        write_bytes(image, encode_texture_png(levels, bits=8 if levels.dtype == np.uint8 else 16))
        written += 1
    mask = None
    if view.mask is not None:
        mask = cache_dir / f"{_cache_name('mask', file_digest(view.mask), win.box, win.width, win.height)}.png"
        if not mask.is_file():
            write_bytes(mask, _mask_png(reduce_mask(load_mask(view.mask, scene.file, view.name, full), win)))
            written += 1
    return dataclasses.replace(view, image=image, mask=mask, camera=working_camera(cam, win)), written


def working_scene(scene: Scene, plan: WorkingPlan, cache_dir: Path, *, quiet: bool = False) -> tuple[Scene, int]:
    """The scene with working views (photos reduced into `cache_dir` once; files of other windows or
    photos there are removed) -> (scene, number of files written now)."""
    cache_dir.mkdir(parents=True, exist_ok=True)
    views, written = [], 0
    for v in progress_iter(scene.views, desc="working photos", unit="view", quiet=quiet):
        wv, n = working_view(scene, v, plan.views[v.name].window, cache_dir)
        views.append(wv)
        written += n
    keep = {v.image.name for v in views} | {v.mask.name for v in views if v.mask is not None}
    for p in cache_dir.glob("*.png"):
        if p.name not in keep:
            p.unlink(missing_ok=True)
    man = scene.original
    derived = Scene(manifest=dataclasses.replace(man, views=tuple(views)), mesh=scene.mesh,
                    photo_cache_bytes=scene.photo_cache_bytes, source=man, warnings=scene.warnings,
                    content_key=key_of(CACHE_VERSION, man.content_hash(), plan.to_json()))
    return derived, written
