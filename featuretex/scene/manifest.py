"""Read and validate `scene.yaml` (the format: docs/contracts.md, section 1). Every violation raises
InputError naming file, view, field."""

from __future__ import annotations

import hashlib
import math
import re
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from featuretex.errors import input_error
from featuretex.settings import shown
from featuretex.scene.camera import MODELS, Camera

FORMAT = "featuretex-scene/1"
TOP_KEYS = {"format", "mesh", "unit", "up", "cameras", "views"}
CAMERA_KEYS = {"model", "width", "height", "fx", "fy", "cx", "cy", "distortion", "axes", "focal_mm",
               "sensor_width_mm"}
VIEW_KEYS = {"name", "image", "mask", "camera", "world_to_camera", "camera_to_world", "holdout"}
POSE_KEYS = ("world_to_camera", "camera_to_world")
# camera axes conventions -> the (4, 4) change to featuretex's own (+x right, +y down, +z forward)
AXES = {"opencv": np.eye(4), "opengl": np.diag([1.0, -1.0, -1.0, 1.0])}
# scene units accepted, with their length in metres
UNITS = {"meter": 1.0, "metre": 1.0, "m": 1.0, "centimeter": 0.01, "centimetre": 0.01, "cm": 0.01,
         "millimeter": 0.001, "millimetre": 0.001, "mm": 0.001, "inch": 0.0254, "in": 0.0254,
         "foot": 0.3048, "ft": 0.3048}
ROTATION_TOL = 1e-4  # max |R^T R - I| entry, and |det R - 1|
MAX_PIXELS_PER_SIDE = 1 << 16   # wider than any sensor; bounds memory before an image is read
MAX_MANIFEST_BYTES = 64 << 20   # a scene.yaml larger than this is not a scene description
DISTORTION_TOL_PX = 0.01        # undistort -> distort round trip at the image border, pixels
# plausible focal length / image width: a field of view across the image between about 127 degrees
# (beyond what a pinhole or Brown-Conrady model describes) and 0.6 degrees (past a 1200 mm lens on
# a small sensor)
FOCAL_PER_WIDTH = (0.25, 100.0)


@dataclass(frozen=True)
class View:
    """One calibrated photo."""

    name: str
    image: Path
    mask: Path | None
    camera: Camera
    world_to_camera: np.ndarray = field(repr=False)  # (4, 4) float64, OpenCV camera axes
    holdout: bool = False
    pose_key: str = "world_to_camera"                # how scene.yaml gave the pose (POSE_KEYS)

    @property
    def R(self) -> np.ndarray:
        """(3, 3) world-to-camera rotation."""
        return self.world_to_camera[:3, :3]

    @property
    def t(self) -> np.ndarray:
        """(3,) world-to-camera translation, scene units."""
        return self.world_to_camera[:3, 3]

    @property
    def centre(self) -> np.ndarray:
        """(3,) camera centre in world coords, scene units."""
        return -self.R.T @ self.t

    def to_camera(self, pts_world: np.ndarray) -> np.ndarray:
        """(N, 3) world points -> (N, 3) camera-space points."""
        # einsum, not @: OpenBLAS's threads slow this memory-bound product down on a busy machine
        return np.einsum("nk,jk->nj", np.asarray(pts_world, dtype=np.float64), self.R) + self.t


@dataclass(frozen=True)
class Manifest:
    """The validated content of scene.yaml (files are checked to exist, not yet decoded)."""

    path: Path
    mesh: Path
    unit: str
    cameras: dict[str, Camera]
    views: tuple[View, ...]
    up: np.ndarray | None = None     # (3,) float64 unit, scene frame, when scene.yaml gives it
    assumed: tuple[tuple[str, str], ...] = ()   # (what, one plain sentence) for values not given

    @property
    def root(self) -> Path:
        return self.path.parent

    @property
    def unit_m(self) -> float:
        """Length of one scene unit in metres."""
        return UNITS[self.unit]

    @property
    def fitted(self) -> tuple[View, ...]:
        return tuple(v for v in self.views if not v.holdout)

    @property
    def heldout(self) -> tuple[View, ...]:
        return tuple(v for v in self.views if v.holdout)

    def content_hash(self) -> str:
        """Hash of the manifest text plus the bytes of every file it names."""
        h = hashlib.sha256(self.path.read_bytes())
        for p in [self.mesh] + [v.image for v in self.views] + [v.mask for v in self.views if v.mask]:
            h.update(file_digest(p).encode())
        return h.hexdigest()[:16]


def file_digest(p: Path) -> str:
    """sha256 of a file's bytes, hex; remembered per (path, size, modification time)."""
    st = p.stat()
    return _digest(str(p), st.st_size, st.st_mtime_ns)


@lru_cache(maxsize=4096)
def _digest(path: str, size: int, mtime_ns: int) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _short(value: Any, limit: int = 60) -> str:
    """A user value in a message: at most `limit` characters, never built whole (a value can be huge)."""
    return shown(value, limit)


def _number(value: Any, file: str, *, view: str | None, fld: str, positive: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise input_error(file, f"expected a number, got {_short(value)}", view=view, field=fld,
                          hint="write a plain number without quotes, e.g. 1100.0")
    try:
        v = float(value)
    except OverflowError:          # an integer beyond the float range
        v = math.inf
    if not math.isfinite(v):
        raise input_error(file, f"must be finite, got {_short(value)}", view=view, field=fld,
                          hint="the tool that wrote the file lost this value; export it again")
    if positive and v <= 0:
        raise input_error(file, f"must be > 0, got {_short(value)}", view=view, field=fld,
                          hint="fx/fy are in pixels; focal_mm and sensor_width_mm in millimetres")
    return v


def _integer(value: Any, file: str, *, view: str | None, fld: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 0 < value <= MAX_PIXELS_PER_SIDE:
        raise input_error(file, f"expected a whole number of pixels in 1..{MAX_PIXELS_PER_SIDE}, "
                          f"got {_short(value)}", view=view, field=fld)
    return int(value)


def _resolve_path(root: Path, value: Any, file: str, *, view: str | None, fld: str) -> Path:
    """A path relative to the scene folder; refuse absolute paths and paths that leave the folder.

    Symbolic links are followed, so a link inside the folder that points outside is refused too.
    """
    if not isinstance(value, str) or not value.strip():
        raise input_error(file, f"expected a relative file path, got {_short(value)}", view=view, field=fld)
    if not value.isprintable():
        raise input_error(file, f"path {_short(value)} contains control characters", view=view, field=fld)
    rel = Path(value)
    if rel.is_absolute():
        raise input_error(file, f"absolute path {_short(value)} refused", view=view, field=fld,
                          hint="paths must be relative to the folder of scene.yaml")
    try:
        p = (root / rel).resolve()
        inside = p.is_relative_to(root.resolve())
        exists = p.is_file()
    except (OSError, RuntimeError, ValueError) as e:   # name too long, symlink loop, ...
        raise input_error(file, f"cannot use path {_short(value)}: {e}", view=view, field=fld) from None
    if not inside:
        raise input_error(file, f"path {_short(value)} leaves the scene folder; refused", view=view, field=fld,
                          hint="copy the file into the folder of scene.yaml (symbolic links are followed)")
    if not exists:
        raise input_error(file, f"file {_short(value)} not found", view=view, field=fld,
                          hint="paths are relative to the folder of scene.yaml")
    return p


def _key_text(k: Any) -> str:
    """A mapping key as it may appear in a one-line message."""
    return k if isinstance(k, str) and k.isprintable() and len(k) <= 40 else _short(k, 40)


def _unknown_keys(d: dict, allowed: set[str], file: str, *, view: str | None, where: str) -> None:
    extra = sorted(_key_text(k) for k in d if not (isinstance(k, str) and k in allowed))
    if extra:
        raise input_error(file, f"unknown key(s) {', '.join(extra)} in {where}", view=view, field=extra[0],
                          hint=f"allowed: {', '.join(sorted(allowed))}")


def parse_up(value: Any, file: str) -> np.ndarray:
    """`up: [x, y, z]` -> (3,) float64 unit vector."""
    if not isinstance(value, list) or len(value) != 3:
        raise input_error(file, f"expected a direction [x, y, z], got {_short(value)}", field="up",
                          hint="e.g. 'up: [0, 0, 1]' for a scene whose +z points up; leave it out to estimate it")
    v = np.array([_number(x, file, view=None, fld=f"up[{i}]") for i, x in enumerate(value)])
    norm = float(np.linalg.norm(v))
    if not (0 < norm < math.inf):
        raise input_error(file, f"the direction {_short(value)} has no length", field="up",
                          hint="e.g. 'up: [0, 0, 1]' for a scene whose +z points up")
    return v / norm


def _text_id(value: Any) -> str | None:
    """A camera id or view name: printable text, or a whole number (YAML reads `0:` as an int)."""
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        return str(value)
    if isinstance(value, str) and value and value.isprintable():
        return value
    return None


def _one_way(d: dict, ways: tuple[tuple[str, ...], ...], file: str, where: str, *, view: str | None = None,
             what: str) -> tuple[str, ...]:
    """Which of the alternative key sets `ways` the mapping uses: exactly one, and all of its keys."""
    used = [w for w in ways if any(k in d for k in w)]
    names = " or ".join("/".join(w) for w in ways)
    if len(used) != 1:
        fld = "/".join(k for w in (used or ways) for k in w)
        raise input_error(file, "missing" if not used else f"give {what} one way only", view=view,
                          field=f"{where}{fld}" if view is None else fld, hint=f"write either {names}")
    for k in used[0]:
        if k not in d:
            raise input_error(file, "missing", view=view, field=f"{where}{k}" if view is None else k,
                              hint=f"{'/'.join(used[0])} go together")
    return used[0]


def _focal_px(d: dict, w: int, file: str, where: str) -> tuple[float, float]:
    """(fx, fy) in pixels, from fx/fy or from focal_mm with sensor_width_mm (square pixels)."""
    way = _one_way(d, (("fx", "fy"), ("focal_mm", "sensor_width_mm")), file, f"{where}.", what="the focal length")
    if way == ("fx", "fy"):
        fx = _number(d["fx"], file, view=None, fld=f"{where}.fx", positive=True)
        fy = _number(d["fy"], file, view=None, fld=f"{where}.fy", positive=True)
        _plausible_focal(fx, w, file, f"{where}.fx", f"fx = {fx:g} px",
                         f"is it a focal length in millimetres? then write 'focal_mm: {fx:g}' and the sensor's "
                         "width as 'sensor_width_mm' instead of fx and fy")
        return fx, fy
    mm = _number(d["focal_mm"], file, view=None, fld=f"{where}.focal_mm", positive=True)
    sensor = _number(d["sensor_width_mm"], file, view=None, fld=f"{where}.sensor_width_mm", positive=True)
    f = mm * w / sensor           # pixels per mm across the sensor, times the focal length in mm
    # typical sensor widths (common practice): full frame 36 mm (the 135 film frame), APS-C about 23.5 mm
    _plausible_focal(f, w, file, f"{where}.focal_mm/sensor_width_mm", f"focal_mm {mm:g} on a {sensor:g} mm sensor",
                     "sensor_width_mm is the sensor's width in millimetres (36 for full frame, about 23.5 "
                     "for APS-C)")
    return f, f


def _plausible_focal(f: float, w: int, file: str, fld: str, given: str, hint: str) -> None:
    if not FOCAL_PER_WIDTH[0] <= f / w <= FOCAL_PER_WIDTH[1]:
        fov = math.degrees(2 * math.atan(w / (2 * f)))
        raise input_error(file, f"{given} means a {fov:.3g} degree field of view across the {w} px wide "
                          "photo, which no photo of an object has", field=fld, hint=hint)


def parse_camera(cid: str, d: Any, file: str) -> tuple[Camera, list[tuple[str, str]]]:
    """One camera block -> (Camera, what was assumed for values it leaves out)."""
    where = f"cameras.{cid}"
    if not isinstance(d, dict):
        raise input_error(file, f"expected a mapping of camera fields, got {_short(d)}", field=where)
    _unknown_keys(d, CAMERA_KEYS, file, view=None, where=where)
    for k in ("model", "width", "height"):
        if k not in d:
            raise input_error(file, "missing", field=f"{where}.{k}",
                              hint="a camera needs model, width, height, a focal length (fx and fy, or "
                                   "focal_mm and sensor_width_mm), cx and cy")
    model = d["model"]
    if not isinstance(model, str) or model not in MODELS:
        raise input_error(file, f"unknown camera model {_short(model)}", field=f"{where}.model",
                          hint=f"use one of {', '.join(MODELS)}")
    axes = d.get("axes", "opencv")
    if not isinstance(axes, str) or axes not in AXES:
        raise input_error(file, f"unknown camera axes {_short(axes)}", field=f"{where}.axes",
                          hint="opencv (+x right, +y down, +z forward) or opengl (+x right, +y up, looks down -z)")
    w = _integer(d["width"], file, view=None, fld=f"{where}.width")
    h = _integer(d["height"], file, view=None, fld=f"{where}.height")
    fx, fy = _focal_px(d, w, file, where)
    assumed = []
    if "cx" not in d and "cy" not in d:
        cx, cy = (w - 1) / 2, (h - 1) / 2
        assumed.append(("principal point", f"camera '{cid}' gives no cx/cy: the image centre "
                                           f"({cx:g}, {cy:g}) is taken as its principal point"))
    else:
        _one_way(d, (("cx", "cy"),), file, f"{where}.", what="the principal point")
        cx = _number(d["cx"], file, view=None, fld=f"{where}.cx")
        cy = _number(d["cy"], file, view=None, fld=f"{where}.cy")
    if not (-0.5 * w <= cx <= 1.5 * w and -0.5 * h <= cy <= 1.5 * h):
        raise input_error(file, f"principal point ({cx:g}, {cy:g}) lies far outside the {w}x{h} image",
                          field=f"{where}.cx/cy", hint="cx, cy are in pixels; (0, 0) is the top-left pixel centre")
    dist = d.get("distortion", None)
    coeffs = (0.0, 0.0, 0.0, 0.0, 0.0)
    if dist is not None:
        if not isinstance(dist, list) or len(dist) not in (4, 5):
            raise input_error(file, f"expected a list [k1, k2, p1, p2, k3] (OpenCV order), got {_short(dist)}",
                              field=f"{where}.distortion", hint="4 or 5 numbers; leave it out for no distortion")
        vals = [_number(c, file, view=None, fld=f"{where}.distortion[{i}]") for i, c in enumerate(dist)]
        coeffs = tuple(vals + [0.0] * (5 - len(vals)))  # type: ignore[assignment]
    cam = Camera(id=cid, model=model, width=w, height=h, fx=fx, fy=fy, cx=cx, cy=cy, distortion=coeffs, axes=axes)
    _check_distortion(cam, file, where)
    return cam, assumed


def _check_distortion(cam: Camera, file: str, where: str) -> None:
    """The lens model must map the image one-to-one: along every line from the principal point to
    the border, undistorted points move steadily outwards and distort back onto their pixels."""
    if not cam.distorted:
        return
    w, h = cam.width, cam.height
    t = np.linspace(0.0, 1.0, 65)
    border = np.concatenate([np.stack([t * (w - 1), np.zeros_like(t)], 1),
                             np.stack([t * (w - 1), np.full_like(t, h - 1)], 1),
                             np.stack([np.zeros_like(t), t * (h - 1)], 1),
                             np.stack([np.full_like(t, w - 1), t * (h - 1)], 1)])      # (260, 2) px
    centre = np.array([cam.cx, cam.cy])
    frac = np.linspace(0.05, 1.0, 20)[:, None, None]
    px = centre + frac * (border - centre)                                               # (20, 260, 2)
    with np.errstate(all="ignore"):
        rays = cam.unproject(px.reshape(-1, 2))
        back = cam.project(rays).reshape(px.shape)
        ideal = (rays[:, :2] * [cam.fx, cam.fy]).reshape(px.shape)   # undistorted offsets, pixels
        outward = np.einsum("fnk,nk->fn", ideal, border - centre)
        err = np.abs(back - px).max() if np.all(np.isfinite(back)) else math.inf
        steady = bool(np.all(np.diff(outward, axis=0) > 0))
    if not (err <= DISTORTION_TOL_PX and steady):
        raise input_error(file, "the lens distortion cannot be inverted reliably inside the image "
                          f"(pixel -> ray -> pixel off by {err:.3g} px{'' if steady else '; rays fold back'})",
                          field=f"{where}.distortion",
                          hint="check the coefficients and their order: OpenCV's k1, k2, p1, p2, k3")


def _matrix(value: Any, file: str, view: str, fld: str) -> np.ndarray:
    """A 3x4 or 4x4 nested list of plain numbers -> (rows, 4) float64; nothing else is taken as one."""
    if not isinstance(value, list) or len(value) not in (3, 4):
        raise input_error(file, f"expected a 3x4 or 4x4 matrix (a list of rows), got {_short(value)}",
                          view=view, field=fld, hint="[[r00, r01, r02, tx], [r10, r11, r12, ty], [r20, r21, r22, tz]]")
    rows = []
    for i, row in enumerate(value):
        if not isinstance(row, list) or len(row) != 4:
            raise input_error(file, f"row {i} must be a list of 4 numbers, got {_short(row)}", view=view, field=fld,
                              hint="[[r00, r01, r02, tx], [r10, r11, r12, ty], [r20, r21, r22, tz]]")
        rows.append([_number(x, file, view=view, fld=f"{fld}[{i}][{j}]") for j, x in enumerate(row)])
    return np.array(rows, dtype=np.float64)


def parse_pose(value: Any, file: str, view: str, fld: str = "world_to_camera") -> np.ndarray:
    """3x4 or 4x4 nested list -> (4, 4) float64 rigid transform, as written (no inversion).

    The 3x3 block must be a proper rotation. A block within ROTATION_TOL of a rotation (rounded
    printing) is replaced by the nearest rotation (SVD), so everything downstream works with an
    exact rigid transform.
    """
    m = _matrix(value, file, view, fld)
    if m.shape == (4, 4) and not np.allclose(m[3], [0, 0, 0, 1], atol=1e-9):
        raise input_error(file, f"last row must be [0, 0, 0, 1], got {m[3].tolist()}", view=view, field=fld)
    R = m[:3, :3]
    with np.errstate(all="ignore"):       # huge entries: inf / nan below, and refused
        ortho = float(np.abs(R.T @ R - np.eye(3)).max())
        det = float(np.linalg.det(R))
    if not (ortho <= ROTATION_TOL and abs(det - 1) <= ROTATION_TOL):   # also false for nan
        what = "a mirror (det < 0)" if det < 0 else "not a rotation"
        raise input_error(file, f"the 3x3 block is {what} (max |RᵀR − I| = {ortho:.2g}, det = {det:.4g})",
                          view=view, field=fld,
                          hint=f"{fld} must be a rigid transform; scale belongs in the mesh or 'unit'")
    u, _, vt = np.linalg.svd(R)
    out = np.eye(4)
    out[:3, :3] = u @ vt
    out[:3, 3] = m[:3, 3]
    return out


def invert_rigid(m: np.ndarray) -> np.ndarray:
    """(4, 4) rigid transform -> its inverse, exactly [R^T, -R^T t]."""
    out = np.eye(4)
    out[:3, :3] = m[:3, :3].T
    out[:3, 3] = -m[:3, :3].T @ m[:3, 3]
    return out


def world_to_camera(pose: np.ndarray, pose_key: str, axes: str) -> np.ndarray:
    """A pose as scene.yaml gives it -> (4, 4) world_to_camera in OpenCV camera axes."""
    w2c = pose if pose_key == "world_to_camera" else invert_rigid(pose)
    return AXES[axes] @ w2c


class _StrictLoader(getattr(yaml, "CSafeLoader", yaml.SafeLoader)):  # libyaml's parser when present
    """PyYAML's safe loader, refusing a key given twice in one mapping (PyYAML keeps the last silently)."""


def _no_duplicates(loader: _StrictLoader, node: yaml.MappingNode, deep: bool = False) -> dict:
    seen: set = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        try:
            dup = key in seen
            seen.add(key)
        except TypeError:       # unhashable key: let the normal constructor report it
            break
        if dup:
            raise yaml.constructor.ConstructorError(None, None, f"key {_short(key, 30)} appears twice",
                                                    key_node.start_mark)
    return loader.construct_mapping(node, deep=deep)


_StrictLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _no_duplicates)


def _no_aliases(text: str, file: str) -> None:
    """Refuse YAML anchors and aliases (&a, *a): a few nested aliases in a kilobyte expand to
    billions of values in anything that walks the document."""
    for token in yaml.scan(text, Loader=_StrictLoader):
        if isinstance(token, (yaml.AnchorToken, yaml.AliasToken)):
            line = token.start_mark.line + 1
            raise input_error(file, f"line {line}: YAML anchors and aliases ('&', '*') are not accepted in a scene "
                              "file", hint="write every value out")


def _load_yaml(path: Path, file: str) -> Any:
    try:
        size = path.stat().st_size
        if size > MAX_MANIFEST_BYTES:
            raise input_error(file, f"is {size / 2**20:.0f} MiB; a scene description is a few kB",
                              hint="is this the right file?")
        text = path.read_bytes().decode("utf-8")
        _no_aliases(text, file)
        return yaml.load(text, Loader=_StrictLoader)  # noqa: S506 (a SafeLoader subclass)
    except yaml.YAMLError as e:
        first = " ".join(str(e).split()).replace('in "<unicode string>", ', "at ")[:200]
        raise input_error(file, f"not valid YAML: {first}", hint="check indentation, brackets and quotes") from None
    except UnicodeDecodeError:
        raise input_error(file, "not UTF-8 text", hint="save scene.yaml as UTF-8") from None
    except RecursionError:
        raise input_error(file, "nested too deeply to be a scene description") from None
    except OSError as e:
        raise input_error(file, f"cannot read: {e.strerror or e}") from None


def view_file_stem(name: str) -> str:
    """The file-name stem of outputs made per view (held-out renders): the view's name with every
    character outside A-Z a-z 0-9 . _ - replaced by '_', no leading dot, at most 100 characters.
    View names are labels; this keeps what is written inside the run folder whatever they hold."""
    stem = re.sub(r"[^A-Za-z0-9._-]", "_", name)[:100]
    return "_" + stem[1:] if stem.startswith(".") else stem or "_"


def _check_file_stems(views: list[View], file: str) -> None:
    """Two views whose names map to one file name (also on a case-insensitive file system)."""
    seen: dict[str, str] = {}
    for v in views:
        stem = view_file_stem(v.name).lower()
        if stem in seen:
            raise input_error(file, f"its outputs would share file names with view {_short(seen[stem])} "
                              f"('{view_file_stem(v.name)}')", view=v.name, field="name",
                              hint="view names are compared as file names: letters A-Z, digits, '.', '_' and '-' "
                              "count, other characters become '_', and case does not count")
        seen[stem] = v.name


def _parse_view(i: int, vd: Any, file: str, root: Path, cameras: dict[str, Camera], seen: set[str]) -> View:
    if not isinstance(vd, dict):
        raise input_error(file, f"expected a mapping, got {_short(vd)}", field=f"views[{i}]")
    name = _text_id(vd.get("name"))
    if name is None:
        raise input_error(file, f"missing or not text: {_short(vd.get('name'))}", field=f"views[{i}].name",
                          hint="write the name in quotes")
    _unknown_keys(vd, VIEW_KEYS, file, view=name, where=f"views[{i}]")
    if name in seen:
        raise input_error(file, "duplicate view name", view=name, field="name",
                          hint="every view needs its own name")
    seen.add(name)
    for k in ("image", "camera"):
        if k not in vd:
            raise input_error(file, "missing", view=name, field=k,
                              hint="a view needs name, image, camera and world_to_camera (or camera_to_world)")
    (pose_key,) = _one_way(vd, tuple((k,) for k in POSE_KEYS), file, "", view=name, what="the pose")
    cid = _text_id(vd["camera"])
    if cid not in cameras:
        raise input_error(file, f"unknown camera id {_short(vd['camera'])}", view=name, field="camera",
                          hint=f"defined: {', '.join(sorted(cameras))}")
    image = _resolve_path(root, vd["image"], file, view=name, fld="image")
    mask = None
    if vd.get("mask") is not None:
        mask = _resolve_path(root, vd["mask"], file, view=name, fld="mask")
    holdout = vd.get("holdout", False)
    if not isinstance(holdout, bool):
        raise input_error(file, f"expected true or false, got {_short(holdout)}", view=name, field="holdout",
                          hint="true = the view is only scored, never fitted")
    cam = cameras[cid]
    pose = world_to_camera(parse_pose(vd[pose_key], file, name, pose_key), pose_key, cam.axes)
    return View(name=name, image=image, mask=mask, camera=cam, world_to_camera=pose, holdout=holdout,
                pose_key=pose_key)


def read_manifest(path: str | Path) -> Manifest:
    """Parse and validate scene.yaml; check every referenced file exists inside the scene folder.

    Raises only InputError (message names file, view and field), whatever the file holds.
    """
    path = Path(path)
    file = str(path)
    try:
        if path.is_dir():
            path = path / "scene.yaml"
            file = str(path)
        found = path.is_file()
    except (OSError, ValueError) as e:
        raise input_error(file, f"cannot use this scene path: {e}") from None
    if not found:
        raise input_error(file, "scene file not found", hint="pass scene=path/to/scene.yaml or its folder")
    data = _load_yaml(path, file)
    if not isinstance(data, dict):
        raise input_error(file, f"expected a mapping at the top level, got {_short(data)}",
                          hint="is this a scene.yaml? it holds format, mesh, unit, cameras and views")
    _unknown_keys(data, TOP_KEYS, file, view=None, where="the top level")
    if data.get("format") != FORMAT:
        raise input_error(file, f"expected '{FORMAT}', got {_short(data.get('format'))}", field="format",
                          hint=f"a scene file starts with the line 'format: {FORMAT}'")
    root = path.parent
    if "mesh" not in data:
        raise input_error(file, "missing", field="mesh", hint="name the mesh file, e.g. 'mesh: mesh.obj'")
    mesh = _resolve_path(root, data["mesh"], file, view=None, fld="mesh")
    unit = data.get("unit", None)
    if not isinstance(unit, str) or unit not in UNITS:
        raise input_error(file, "missing" if unit is None else f"unsupported unit {_short(unit)}", field="unit",
                          hint="use meter, centimeter, millimeter, inch or foot")
    cams_raw = data.get("cameras")
    if not isinstance(cams_raw, dict) or not cams_raw:
        raise input_error(file, f"expected a non-empty mapping of camera id -> intrinsics, got {_short(cams_raw)}",
                          field="cameras", hint="write 'cameras:' then one indented block per camera id")
    cameras: dict[str, Camera] = {}
    assumed: list[tuple[str, str]] = []
    for key, d in cams_raw.items():
        cid = _text_id(key)
        if cid is None:
            raise input_error(file, f"camera id {_short(key)} is not text", field="cameras")
        if cid in cameras:
            raise input_error(file, f"camera id {cid!r} given twice", field="cameras")
        cameras[cid], notes = parse_camera(cid, d, file)
        assumed += notes
    views_raw = data.get("views")
    if not isinstance(views_raw, list) or not views_raw:
        raise input_error(file, f"expected a non-empty list of views, got {_short(views_raw)}", field="views",
                          hint="each view is a '- name: ...' entry under 'views:'")
    seen: set[str] = set()
    views = [_parse_view(i, vd, file, root, cameras, seen) for i, vd in enumerate(views_raw)]
    _check_file_stems(views, file)
    n_fit = sum(not v.holdout for v in views)
    if n_fit == 0:
        raise input_error(file, "every view is held out; nothing to fit", field="views[].holdout",
                          hint="mark at least two views 'holdout: false'")
    if n_fit < 2:
        raise input_error(file, f"only {n_fit} fitted view; at least 2 are needed", field="views[].holdout",
                          hint="mark at least two views 'holdout: false'")
    up = parse_up(data["up"], file) if data.get("up") is not None else None
    return Manifest(path=path, mesh=mesh, unit=unit, cameras=cameras, views=tuple(views), up=up,
                    assumed=tuple(assumed))
