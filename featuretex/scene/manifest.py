"""Read and validate `scene.yaml` (DESIGN §2). Every violation raises InputError naming file, view, field."""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from featuretex.errors import InputError, input_error
from featuretex.scene.camera import MODELS, Camera

FORMAT = "featuretex-scene/1"
TOP_KEYS = {"format", "mesh", "unit", "cameras", "views"}
CAMERA_KEYS = {"model", "width", "height", "fx", "fy", "cx", "cy", "distortion"}
VIEW_KEYS = {"name", "image", "mask", "camera", "world_to_camera", "holdout"}
# scene units accepted, with their length in metres
UNITS = {"meter": 1.0, "metre": 1.0, "m": 1.0, "centimeter": 0.01, "centimetre": 0.01, "cm": 0.01,
         "millimeter": 0.001, "millimetre": 0.001, "mm": 0.001, "inch": 0.0254, "in": 0.0254,
         "foot": 0.3048, "ft": 0.3048}
ROTATION_TOL = 1e-4  # max |R^T R - I| entry, and |det R - 1|


@dataclass(frozen=True)
class View:
    """One calibrated photo."""

    name: str
    image: Path
    mask: Path | None
    camera: Camera
    world_to_camera: np.ndarray = field(repr=False)  # (4, 4) float64
    holdout: bool = False

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
        return np.asarray(pts_world, dtype=np.float64) @ self.R.T + self.t


@dataclass(frozen=True)
class Manifest:
    """The validated content of scene.yaml (files are checked to exist, not yet decoded)."""

    path: Path
    mesh: Path
    unit: str
    cameras: dict[str, Camera]
    views: tuple[View, ...]

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
            h.update(_file_digest(p).encode())
        return h.hexdigest()[:16]


def _file_digest(p: Path) -> str:
    h = hashlib.sha256()
    with open(p, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _number(value: Any, file: str, *, view: str | None, fld: str, positive: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise input_error(file, f"expected a number, got {value!r}", view=view, field=fld)
    v = float(value)
    if not math.isfinite(v):
        raise input_error(file, f"must be finite, got {value!r}", view=view, field=fld)
    if positive and v <= 0:
        raise input_error(file, f"must be > 0, got {value!r}", view=view, field=fld)
    return v


def _integer(value: Any, file: str, *, view: str | None, fld: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value <= 0:
        raise input_error(file, f"expected a positive whole number, got {value!r}", view=view, field=fld)
    return int(value)


def _resolve_path(root: Path, value: Any, file: str, *, view: str | None, fld: str) -> Path:
    """A path relative to the scene folder; refuse absolute paths and paths that leave the folder."""
    if not isinstance(value, str) or not value.strip():
        raise input_error(file, f"expected a relative file path, got {value!r}", view=view, field=fld)
    rel = Path(value)
    if rel.is_absolute():
        raise input_error(file, f"absolute path '{value}' refused", view=view, field=fld,
                          hint="paths must be relative to the folder of scene.yaml")
    p = (root / rel).resolve()
    if not p.is_relative_to(root.resolve()):
        raise input_error(file, f"path '{value}' leaves the scene folder; refused", view=view, field=fld,
                          hint="keep every file inside the folder of scene.yaml")
    if not p.is_file():
        raise input_error(file, f"file '{value}' not found", view=view, field=fld)
    return p


def _unknown_keys(d: dict, allowed: set[str], file: str, *, view: str | None, where: str) -> None:
    extra = sorted(str(k) for k in d if k not in allowed)
    if extra:
        raise input_error(file, f"unknown key(s) {', '.join(extra)} in {where}", view=view, field=extra[0],
                          hint=f"allowed: {', '.join(sorted(allowed))}")


def parse_camera(cid: str, d: Any, file: str) -> Camera:
    where = f"cameras.{cid}"
    if not isinstance(d, dict):
        raise input_error(file, "expected a mapping of camera fields", field=where)
    _unknown_keys(d, CAMERA_KEYS, file, view=None, where=where)
    for k in ("model", "width", "height", "fx", "fy", "cx", "cy"):
        if k not in d:
            raise input_error(file, "missing", field=f"{where}.{k}")
    model = d["model"]
    if model not in MODELS:
        raise input_error(file, f"unknown camera model {model!r}", field=f"{where}.model",
                          hint=f"use one of {', '.join(MODELS)}")
    w = _integer(d["width"], file, view=None, fld=f"{where}.width")
    h = _integer(d["height"], file, view=None, fld=f"{where}.height")
    fx = _number(d["fx"], file, view=None, fld=f"{where}.fx", positive=True)
    fy = _number(d["fy"], file, view=None, fld=f"{where}.fy", positive=True)
    cx = _number(d["cx"], file, view=None, fld=f"{where}.cx")
    cy = _number(d["cy"], file, view=None, fld=f"{where}.cy")
    if not (-0.5 * w <= cx <= 1.5 * w and -0.5 * h <= cy <= 1.5 * h):
        raise input_error(file, f"principal point ({cx}, {cy}) lies far outside the {w}x{h} image",
                          field=f"{where}.cx/cy", hint="cx, cy are in pixels; (0, 0) is the top-left pixel centre")
    dist = d.get("distortion", None)
    coeffs = (0.0, 0.0, 0.0, 0.0, 0.0)
    if dist is not None:
        if not isinstance(dist, list) or len(dist) not in (4, 5):
            raise input_error(file, f"expected a list [k1, k2, p1, p2, k3] (OpenCV order), got {dist!r}",
                              field=f"{where}.distortion")
        vals = [_number(c, file, view=None, fld=f"{where}.distortion[{i}]") for i, c in enumerate(dist)]
        coeffs = tuple(vals + [0.0] * (5 - len(vals)))  # type: ignore[assignment]
    return Camera(id=cid, model=model, width=w, height=h, fx=fx, fy=fy, cx=cx, cy=cy, distortion=coeffs)


def parse_pose(value: Any, file: str, view: str) -> np.ndarray:
    """3x4 or 4x4 nested list -> (4, 4) float64; the 3x3 block must be a proper rotation."""
    fld = "world_to_camera"
    try:
        m = np.array(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise input_error(file, "expected a 3x4 or 4x4 matrix of numbers", view=view, field=fld) from None
    if m.shape not in ((3, 4), (4, 4)):
        raise input_error(file, f"expected a 3x4 or 4x4 matrix, got shape {m.shape}", view=view, field=fld)
    if not np.all(np.isfinite(m)):
        raise input_error(file, "contains NaN or infinite values", view=view, field=fld)
    if m.shape == (4, 4) and not np.allclose(m[3], [0, 0, 0, 1], atol=1e-9):
        raise input_error(file, f"last row must be [0, 0, 0, 1], got {m[3].tolist()}", view=view, field=fld)
    R = m[:3, :3]
    ortho = np.abs(R.T @ R - np.eye(3)).max()
    det = float(np.linalg.det(R))
    if ortho > ROTATION_TOL or abs(det - 1) > ROTATION_TOL:
        raise input_error(file, f"the 3x3 block is not a rotation (max |RᵀR − I| = {ortho:.2g}, det = {det:.4g})",
                          view=view, field=fld,
                          hint="world_to_camera must be a rigid transform; scale belongs in the mesh or 'unit'")
    out = np.eye(4)
    out[:3, :4] = m[:3, :4]
    return out


def read_manifest(path: str | Path) -> Manifest:
    """Parse and validate scene.yaml; check every referenced file exists inside the scene folder."""
    path = Path(path)
    file = str(path)
    if path.is_dir():
        path = path / "scene.yaml"
        file = str(path)
    if not path.is_file():
        raise input_error(file, "scene file not found")
    try:
        data = yaml.safe_load(path.read_text(encoding="utf-8"))
    except (yaml.YAMLError, UnicodeDecodeError) as e:
        raise input_error(file, f"not valid YAML: {str(e).splitlines()[0]}") from None
    if not isinstance(data, dict):
        raise input_error(file, "expected a mapping at the top level")
    _unknown_keys(data, TOP_KEYS, file, view=None, where="the top level")
    if data.get("format") != FORMAT:
        raise input_error(file, f"expected '{FORMAT}', got {data.get('format')!r}", field="format")
    root = path.parent
    if "mesh" not in data:
        raise input_error(file, "missing", field="mesh")
    mesh = _resolve_path(root, data["mesh"], file, view=None, fld="mesh")
    unit = data.get("unit", None)
    if unit not in UNITS:
        raise input_error(file, f"unsupported unit {unit!r}", field="unit",
                          hint="use meter, centimeter, millimeter, inch or foot")
    cams_raw = data.get("cameras")
    if not isinstance(cams_raw, dict) or not cams_raw:
        raise input_error(file, "expected a non-empty mapping of camera id -> intrinsics", field="cameras")
    cameras = {str(cid): parse_camera(str(cid), d, file) for cid, d in cams_raw.items()}
    views_raw = data.get("views")
    if not isinstance(views_raw, list) or not views_raw:
        raise input_error(file, "expected a non-empty list of views", field="views")
    views: list[View] = []
    seen: set[str] = set()
    for i, vd in enumerate(views_raw):
        if not isinstance(vd, dict):
            raise input_error(file, "expected a mapping", field=f"views[{i}]")
        name = vd.get("name")
        if not isinstance(name, str) or not name:
            raise input_error(file, f"missing or not text: {name!r}", field=f"views[{i}].name")
        _unknown_keys(vd, VIEW_KEYS, file, view=name, where=f"views[{i}]")
        if name in seen:
            raise input_error(file, "duplicate view name", view=name, field="name")
        seen.add(name)
        for k in ("image", "camera", "world_to_camera"):
            if k not in vd:
                raise input_error(file, "missing", view=name, field=k)
        cid = str(vd["camera"])
        if cid not in cameras:
            raise input_error(file, f"unknown camera id {cid!r}", view=name, field="camera",
                              hint=f"defined: {', '.join(sorted(cameras))}")
        image = _resolve_path(root, vd["image"], file, view=name, fld="image")
        mask = None
        if vd.get("mask") is not None:
            mask = _resolve_path(root, vd["mask"], file, view=name, fld="mask")
        holdout = vd.get("holdout", False)
        if not isinstance(holdout, bool):
            raise input_error(file, f"expected true or false, got {holdout!r}", view=name, field="holdout")
        pose = parse_pose(vd["world_to_camera"], file, name)
        views.append(View(name=name, image=image, mask=mask, camera=cameras[cid],
                          world_to_camera=pose, holdout=holdout))
    n_fit = sum(not v.holdout for v in views)
    if n_fit == 0:
        raise input_error(file, "every view is held out; nothing to fit", field="views[].holdout",
                          hint="mark at least two views 'holdout: false'")
    if n_fit < 2:
        raise input_error(file, f"only {n_fit} fitted view; at least 2 are needed", field="views[].holdout")
    return Manifest(path=path, mesh=mesh, unit=unit, cameras=cameras, views=tuple(views))


def check_image_sizes(man: Manifest) -> None:
    """Each photo and mask must match its camera's width x height (header read only)."""
    from PIL import Image, ImageOps, UnidentifiedImageError

    for v in man.views:
        for fld, p in (("image", v.image), ("mask", v.mask)):
            if p is None:
                continue
            try:
                with Image.open(p) as im:
                    size = im.size
                    orient = im.getexif().get(0x0112, 1)
            except (UnidentifiedImageError, OSError) as e:
                raise input_error(str(man.path), f"cannot read '{p.name}': {e}", view=v.name, field=fld) from None
            if orient in (5, 6, 7, 8):  # EXIF orientations that swap width and height
                size = (size[1], size[0])
            if size != (v.camera.width, v.camera.height):
                raise input_error(str(man.path), f"'{p.name}' is {size[0]}x{size[1]} but camera "
                                  f"'{v.camera.id}' is {v.camera.width}x{v.camera.height}", view=v.name, field=fld)
