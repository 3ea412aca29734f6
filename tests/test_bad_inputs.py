"""Bad input matrix: every broken scene is refused by the real CLI with exit status 2 and one line.

Each case copies one small good scene (made with featuretex.synth), breaks one thing, and runs
`python -m featuretex.cli scene=<scene.yaml> out=<dir>` in an empty working folder. Checked for
every case: exit status 2; stderr is exactly one line naming the scene file, the view and the
field; no "Traceback" anywhere; every input file byte-identical afterwards; nothing written
outside the output folder. Inputs that are converted rather than refused (grey, RGBA, palette,
16-bit, TIFF, EXIF-rotated photos; repeated / zero-area faces; quads; poses off a rotation by
rounding) are checked against outside references further down, and one CLI run takes them all.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import json
import os
import shutil
import subprocess
import sys
import zlib
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import cv2
import numpy as np
import pytest
import trimesh
import yaml
from PIL import Image, ImageOps

from featuretex import synth
from featuretex.errors import InputError
from featuretex.scene.camera import Camera
from featuretex.scene.images import decode_image, load_mask, load_photo
from featuretex.scene.loaded import load_scene
from featuretex.scene.manifest import parse_pose, view_file_stem
from featuretex.scene.mesh import load_mesh

W, H = 64, 48
ROOT = Path(__file__).resolve().parents[1]
# a short but complete run (every stage) for the cases that are accepted
QUICK = ("fit.steps=4", "fit.eval_every=2", "fit.crop=32", "fit.batch=2", "fit.threads=1", "texture.size=64",
         "report=false", "diagnose.max_grid=32", "diagnose.min_grid=16")


# --------------------------------------------------------------------------------------------
# The good scene and helpers to break copies of it
# --------------------------------------------------------------------------------------------
@pytest.fixture(scope="session")
def good_scene(tmp_path_factory) -> Path:
    """Folder of a valid 4-view scene (3 fitted, 1 held out), 64x48 PNG photos with masks."""
    folder = tmp_path_factory.mktemp("good") / "scene"
    mesh = synth.textured_sphere(0.1, synth.checker_texture(64, 4), n_lat=12, n_lon=24)
    cam = Camera(id="cam0", model="pinhole", width=W, height=H, fx=60.0, fy=60.0, cx=31.5, cy=23.5)
    views = [(f"v{i:02d}", cam, p) for i, p in enumerate(synth.orbit_poses(4, 0.5, [20.0]))]
    shots = synth.render_views(mesh, views, lit=False)
    synth.write_scene(folder, mesh, [s[0] for s in shots], [s[1] for s in shots], views,
                      [False, False, False, True], image_format="png")
    return folder


def _load(folder: Path) -> dict:
    return yaml.safe_load((folder / "scene.yaml").read_text())


def _save(folder: Path, data: dict) -> None:
    (folder / "scene.yaml").write_text(yaml.safe_dump(data, sort_keys=False))


def _edit(fn: Callable[[dict], None]) -> Callable[[Path], None]:
    def apply(folder: Path) -> None:
        d = _load(folder)
        fn(d)
        _save(folder, d)
    return apply


def _text(old: str, new: str) -> Callable[[Path], None]:
    def apply(folder: Path) -> None:
        p = folder / "scene.yaml"
        t = p.read_text()
        assert old in t
        p.write_text(t.replace(old, new, 1))
    return apply


def _set(path: str, value) -> Callable[[Path], None]:
    """Set a field by a path like 'cameras.cam0.fx' or 'views.0.holdout'."""
    def fn(d: dict) -> None:
        *head, last = path.split(".")
        node = d
        for k in head:
            node = node[int(k)] if isinstance(node, list) else node[k]
        if isinstance(node, list):
            node[int(last)] = value
        else:
            node[last] = value
    return _edit(fn)


def _pose(i: int, fn: Callable[[np.ndarray], np.ndarray]) -> Callable[[Path], None]:
    def edit(d: dict) -> None:
        m = np.eye(4)
        m[:3] = np.array(d["views"][i]["world_to_camera"], float)
        d["views"][i]["world_to_camera"] = fn(m)[:3].tolist()
    return _edit(edit)


def _all_poses(fn: Callable[[np.ndarray], np.ndarray]) -> Callable[[Path], None]:
    def edit(d: dict) -> None:
        for v in d["views"]:
            m = np.eye(4)
            m[:3] = np.array(v["world_to_camera"], float)
            v["world_to_camera"] = fn(m)[:3].tolist()
    return _edit(edit)


def _scale_obj(k: float) -> Callable[[str], str]:
    """Every OBJ vertex position times k (the mesh written in another unit than the poses)."""
    def edit(t: str) -> str:
        return "\n".join(" ".join(["v"] + [repr(float(x) * k) for x in ln.split()[1:4]]) if ln.startswith("v ")
                         else ln for ln in t.splitlines()) + "\n"
    return edit


def _each_mask(fn: Callable[[np.ndarray], np.ndarray]) -> Callable[[Path], None]:
    def apply(folder: Path) -> None:
        for p in sorted((folder / "masks").glob("*.png")):
            Image.fromarray(fn(np.asarray(Image.open(p).convert("L"))).astype(np.uint8), "L").save(p)
    return apply


def _rot_y(deg: float) -> np.ndarray:
    a = np.radians(deg)
    r = np.eye(4)
    r[[0, 0, 2, 2], [0, 2, 0, 2]] = [np.cos(a), np.sin(a), -np.sin(a), np.cos(a)]
    return r


def _truncate(rel: str, keep: float = 0.5) -> Callable[[Path], None]:
    def apply(folder: Path) -> None:
        p = folder / rel
        data = p.read_bytes()
        p.write_bytes(data[: int(len(data) * keep)])
    return apply


def _replace_image(rel: str, make: Callable[[np.ndarray], None]) -> Callable[[Path], None]:
    """Rewrite the image file `rel` (same name) from its current RGB pixels with `make(rgb, path)`."""
    def apply(folder: Path) -> None:
        p = folder / rel
        rgb = np.asarray(Image.open(p).convert("RGB"))
        make(rgb, p)
    return apply


def _new_image(rel: str, view: int, fld: str, make: Callable[[np.ndarray, Path], None]) -> Callable[[Path], None]:
    """Write a new image file `rel` from view `view`'s photo pixels and point the view's `fld` at it."""
    def apply(folder: Path) -> None:
        d = _load(folder)
        rgb = np.asarray(Image.open(folder / d["views"][view]["image"]).convert("RGB"))
        make(rgb, folder / rel)
        d["views"][view][fld] = rel
        _save(folder, d)
    return apply


def _mesh_text(text: str, name: str = "broken.obj") -> Callable[[Path], None]:
    def apply(folder: Path) -> None:
        (folder / name).write_text(text)
        d = _load(folder)
        d["mesh"] = name
        _save(folder, d)
    return apply


def _mesh_edit(fn: Callable[[str], str]) -> Callable[[Path], None]:
    def apply(folder: Path) -> None:
        p = folder / "mesh.obj"
        p.write_text(fn(p.read_text()))
    return apply


def _first_v(fn: Callable[[str], str]) -> Callable[[str], str]:
    """Rewrite the first `v` line of an OBJ."""
    def edit(t: str) -> str:
        lines = t.splitlines()
        i = next(k for k, ln in enumerate(lines) if ln.startswith("v "))
        lines[i] = fn(lines[i])
        return "\n".join(lines) + "\n"
    return edit


def _obj_lines(t: str, keep: Callable[[str], bool]) -> str:
    return "\n".join(ln for ln in t.splitlines() if keep(ln)) + "\n"


def _uv_edit(value: str) -> Callable[[str], str]:
    def edit(t: str) -> str:
        lines = t.splitlines()
        i = next(k for k, ln in enumerate(lines) if ln.startswith("vt "))
        lines[i] = f"vt {value}"
        return "\n".join(lines) + "\n"
    return edit


def _ply_truncated(folder: Path) -> None:
    m = trimesh.load(folder / "mesh.obj", process=False, force="mesh")
    data = trimesh.exchange.ply.export_ply(m, encoding="binary")
    (folder / "mesh.ply").write_bytes(data[: len(data) * 2 // 3])
    d = _load(folder)
    d["mesh"] = "mesh.ply"
    _save(folder, d)


def _outside_file(rel_from_scene: str, target_rel: str = "images/v00.png", link: bool = False):
    """Place a copy of a good photo outside the scene folder and point view 0's image at it."""
    def apply(folder: Path) -> None:
        outside = folder.parent / "outside.png"
        shutil.copy(folder / target_rel, outside)
        d = _load(folder)
        if link:
            (folder / "images" / "linked.png").symlink_to(outside)
            d["views"][0]["image"] = "images/linked.png"
        else:
            d["views"][0]["image"] = rel_from_scene.replace("{abs}", str(outside))
        _save(folder, d)
    return apply


def _save_cmyk(rgb, p):
    Image.fromarray(rgb).convert("CMYK").save(p, format="JPEG")


def _save_float_tiff(rgb, p):
    Image.fromarray(rgb[..., 0].astype(np.float32) / 255.0, "F").save(p, format="TIFF")


def _save_resized(rgb, p):
    Image.fromarray(rgb).resize((W // 2, H // 2)).save(p, format="PNG")


def _save_rotated_exif(rgb, p):
    """Stored 64x48 with EXIF orientation 6: upright it is 48x64, which the 64x48 camera refuses."""
    exif = Image.Exif()
    exif[0x0112] = 6
    Image.fromarray(rgb).save(p, format="JPEG", exif=exif, quality=95)


def _save_black_mask(rgb, p):
    Image.fromarray(np.zeros((H, W), np.uint8), "L").save(p, format="PNG")


def _save_small_mask(rgb, p):
    Image.fromarray(np.full((H - 8, W), 255, np.uint8), "L").save(p, format="PNG")


def _save_garbage(rgb, p):
    p.write_bytes(b"this is not an image, just text that ends in .png\n" * 4)


def _corrupt_png_data(rel: str) -> Callable[[Path], None]:
    """Flip bytes inside the first IDAT chunk and write the chunk's CRC anew (PNG spec 1.2 §5.3), so
    only the zlib stream is broken: what a bad sector or a bad copy does."""
    def apply(folder: Path) -> None:
        p = folder / rel
        data = bytearray(p.read_bytes())
        i = 8
        while data[i + 4:i + 8] != b"IDAT":
            i += 12 + int.from_bytes(data[i:i + 4], "big")
        n = int.from_bytes(data[i:i + 4], "big")
        for k in range(i + 8 + n // 2, i + 8 + n // 2 + 6):
            data[k] ^= 0x5A
        data[i + 8 + n:i + 12 + n] = zlib.crc32(bytes(data[i + 4:i + 8 + n])).to_bytes(4, "big")
        p.write_bytes(bytes(data))
    return apply


def _alias_bomb(folder: Path) -> None:
    """Nine levels of ten aliases each (about 1 kB): 10^9 values once expanded."""
    lines = ["a0: &a0 [x, x, x, x, x, x, x, x, x, x]"]
    lines += [f"a{k}: &a{k} [{', '.join([f'*a{k - 1}'] * 10)}]" for k in range(1, 9)]
    p = folder / "scene.yaml"
    p.write_text("\n".join(lines) + "\n" + p.read_text())


@dataclass(frozen=True)
class Case:
    break_it: Callable[[Path], None]
    field: str | None        # must appear as field 'X' in the message (None: a file-level problem)
    view: str | None = None  # must appear as view 'X'
    words: str = ""          # a fragment the message must carry (what is wrong)


# --------------------------------------------------------------------------------------------
# The matrix: name -> how to break the good scene, and what the message must name
# --------------------------------------------------------------------------------------------
CASES: dict[str, Case] = {
    # --- scene.yaml as a whole ---
    "yaml_syntax": Case(_text("views:", "views: [unclosed"), None, words="not valid YAML"),
    "yaml_top_level_list": Case(lambda f: (f / "scene.yaml").write_text("- a\n- b\n"), None, words="mapping"),
    "yaml_not_utf8": Case(lambda f: (f / "scene.yaml").write_bytes(b"format: \xff\xfe\n"), None, words="UTF-8"),
    "yaml_alias_bomb": Case(_alias_bomb, None, words="anchors and aliases"),
    "yaml_huge_value": Case(_set("unit", "furlong" * 2000), "unit", words="furlongfurlong"),
    "yaml_duplicate_key": Case(_text("    fx: 60.0", "    fx: 60.0\n    fx: 61.0"), None, words="appears twice"),
    "format_wrong": Case(_set("format", "some-other-format/2"), "format"),
    "unknown_top_key": Case(_set("colour_space", "srgb"), "colour_space", words="unknown key"),
    "mesh_key_missing": Case(_edit(lambda d: d.pop("mesh")), "mesh", words="missing"),
    "unit_unsupported": Case(_set("unit", "furlong"), "unit", words="furlong"),
    "unit_missing": Case(_edit(lambda d: d.pop("unit")), "unit", words="missing"),
    "views_empty": Case(_set("views", []), "views"),
    "cameras_not_mapping": Case(_set("cameras", ["cam0"]), "cameras"),
    # --- cameras ---
    "camera_unknown_key": Case(_set("cameras.cam0.focal_length", 35), "focal_length", words="unknown key"),
    "camera_focal_given_twice": Case(_edit(lambda d: d["cameras"]["cam0"].update(focal_mm=35, sensor_width_mm=36)),
                                     "cameras.cam0.fx/fy/focal_mm/sensor_width_mm", words="one way only"),
    "camera_focal_mm_as_fx": Case(_edit(lambda d: d["cameras"]["cam0"].update(fx=4.5, fy=4.5)), "cameras.cam0.fx",
                                  words="focal_mm: 4.5"),
    "camera_sensor_width_in_metres": Case(_edit(lambda d: (d["cameras"]["cam0"].pop("fx"), d["cameras"]["cam0"].pop("fy"),
                                                            d["cameras"]["cam0"].update(focal_mm=35, sensor_width_mm=0.036))),
                                          "cameras.cam0.focal_mm/sensor_width_mm", words="field of view"),
    "camera_axes_unknown": Case(_set("cameras.cam0.axes", "blender"), "cameras.cam0.axes", words="blender"),
    "camera_width_text": Case(_set("cameras.cam0.width", "64"), "cameras.cam0.width", words="'64'"),
    "camera_fx_zero": Case(_set("cameras.cam0.fx", 0.0), "cameras.cam0.fx", words="> 0"),
    "camera_fy_list": Case(_set("cameras.cam0.fy", [60.0]), "cameras.cam0.fy", words="expected a number"),
    "camera_principal_point_outside": Case(_set("cameras.cam0.cx", 900.0), "cameras.cam0.cx/cy", words="far outside"),
    "camera_model_unknown": Case(_set("cameras.cam0.model", "fisheye"), "cameras.cam0.model"),
    "camera_distortion_short": Case(_set("cameras.cam0.distortion", [0.1]), "cameras.cam0.distortion"),
    "camera_distortion_folds": Case(_edit(lambda d: d["cameras"]["cam0"].update(model="brown",
                                                                                distortion=[-5.0, 0, 0, 0, 0])),
                                    "cameras.cam0.distortion", words="inverted"),
    "camera_missing_field": Case(_edit(lambda d: d["cameras"]["cam0"].pop("cy")), "cameras.cam0.cy", words="missing"),
    # --- views ---
    "view_unknown_key": Case(_set("views.1.exposure", 1.5), "exposure", "v01", "unknown key"),
    "view_unknown_camera": Case(_set("views.1.camera", "cam9"), "camera", "v01", "cam9"),
    "view_duplicate_name": Case(_set("views.2.name", "v00"), "name", "v00", "duplicate"),
    "view_names_share_a_file_name": Case(_edit(lambda d: (d["views"][1].update(name="side A"),
                                                         d["views"][2].update(name="Side_a"))),
                                         "name", "Side_a", "share file names"),
    "view_name_missing": Case(_edit(lambda d: d["views"][1].pop("name")), "views[1].name"),
    "view_holdout_not_bool": Case(_set("views.0.holdout", "maybe"), "holdout", "v00", "true or false"),
    "all_views_held_out": Case(_edit(lambda d: [v.update(holdout=True) for v in d["views"]]), "views[].holdout",
                               words="held out"),
    "one_fitted_view": Case(_edit(lambda d: [v.update(holdout=i > 0) for i, v in enumerate(d["views"])]),
                            "views[].holdout", words="at least 2"),
    # --- poses ---
    "pose_mirror_det_minus_1": Case(_pose(0, lambda m: np.diag([1.0, 1.0, -1.0, 1.0]) @ m), "world_to_camera", "v00",
                                    "mirror"),
    "pose_scaled_det_8": Case(_pose(0, lambda m: np.diag([2.0, 2.0, 2.0, 1.0]) @ m), "world_to_camera", "v00",
                              "not a rotation"),
    "pose_sheared": Case(_pose(1, lambda m: (np.eye(4) + np.eye(4, k=1) * 0.01) @ m), "world_to_camera", "v01",
                         "not a rotation"),
    "pose_translation_1e308": Case(_pose(0, lambda m: m + np.array([[0, 0, 0, 1e308]] * 3 + [[0, 0, 0, 0]])),
                                   "world_to_camera", "v00", "no part of the mesh projects"),
    "camera_fx_1e-300": Case(_edit(lambda d: d["cameras"]["cam0"].update(fx=1e-300, fy=1e-300)), "cameras.cam0.fx",
                             words="180 degree field of view"),
    "pose_nan": Case(_set("views.0.world_to_camera", [[float("nan"), 0, 0, 0], [0, 1, 0, 0], [0, 0, 1, 0.5]]),
                     "world_to_camera[0][0]", "v00", "finite"),
    "pose_shape_2x4": Case(_set("views.0.world_to_camera", [[1, 0, 0, 0], [0, 1, 0, 0]]), "world_to_camera", "v00",
                           "3x4 or 4x4"),
    "pose_text_entry": Case(_set("views.0.world_to_camera", [[1, 0, 0, "x"], [0, 1, 0, 0], [0, 0, 1, 0.5]]),
                            "world_to_camera[0][3]", "v00", "expected a number"),
    "pose_bad_last_row": Case(_edit(lambda d: d["views"][0]["world_to_camera"].append([0, 0, 1, 1])),
                              "world_to_camera", "v00", "last row"),
    "camera_behind_mesh": Case(_pose(2, lambda m: _rot_y(180) @ m), "world_to_camera", "v02", "behind"),
    "camera_looks_away": Case(_pose(2, lambda m: _rot_y(90) @ m), "world_to_camera", "v02", "looks away"),
    "view_pose_given_twice": Case(_edit(lambda d: d["views"][1].update(
                                      camera_to_world=[list(r) for r in d["views"][1]["world_to_camera"]])),
                                  "world_to_camera/camera_to_world", "v01", "one way only"),
    # --- the scene as a whole (featuretex.scene.sanity) ---
    "poses_in_opengl_axes": Case(_all_poses(lambda m: np.diag([1.0, -1.0, -1.0, 1.0]) @ m), "world_to_camera", "v00",
                                 "'axes: opengl' in camera 'cam0'"),
    "poses_inverted": Case(_all_poses(np.linalg.inv), "world_to_camera", "v00", "under 'camera_to_world'"),
    "mesh_in_millimetres": Case(_mesh_edit(_scale_obj(1000.0)), "world_to_camera", "v00", "different units"),
    "mesh_in_kilometres": Case(_mesh_edit(_scale_obj(0.001)), "world_to_camera", "v00", "different units"),
    "focal_too_short_for_masks": Case(_edit(lambda d: d["cameras"]["cam0"].update(fx=20.0, fy=20.0)),
                                      "world_to_camera", "v00", "focal_mm"),
    "masks_inverted": Case(_each_mask(lambda m: 255 - m), "mask", "v00", "invert the masks"),
    "images_point_at_masks": Case(_edit(lambda d: [v.update(image=v["mask"]) for v in d["views"]]), "image", "v00",
                                  "same pixels as its mask"),
    "images_are_masks_none_given": Case(_edit(lambda d: [v.update(image=v.pop("mask")) for v in d["views"]]), "image",
                                        "v00", "looks like a mask"),
    # --- paths ---
    "image_missing": Case(lambda f: (f / "images" / "v01.png").unlink(), "image", "v01", "not found"),
    "mask_missing": Case(lambda f: (f / "masks" / "v02.png").unlink(), "mask", "v02", "not found"),
    "path_escapes_folder": Case(_outside_file("../outside.png"), "image", "v00", "leaves the scene folder"),
    "path_absolute": Case(_outside_file("{abs}"), "image", "v00", "absolute path"),
    "path_symlink_outside": Case(_outside_file("", link=True), "image", "v00", "leaves the scene folder"),
    "mesh_missing": Case(lambda f: (f / "mesh.obj").unlink(), "mesh", words="not found"),
    # --- photos and masks ---
    "image_truncated_png": Case(_truncate("images/v01.png"), "image", "v01", "truncated"),
    "image_not_an_image": Case(_replace_image("images/v01.png", _save_garbage), "image", "v01", "not an image"),
    "image_wrong_size": Case(_replace_image("images/v02.png", _save_resized), "image", "v02", "32x24"),
    "image_cmyk_jpeg": Case(_new_image("images/v01_cmyk.jpg", 1, "image", _save_cmyk), "image", "v01", "CMYK"),
    "image_float_tiff": Case(_new_image("images/v01.tif", 1, "image", _save_float_tiff), "image", "v01",
                             "floating-point"),
    "image_exif_rotated_wrong_size": Case(_new_image("images/v00_rot.jpg", 0, "image", _save_rotated_exif),
                                          "image", "v00", "48x64"),
    "image_truncated_jpeg": Case(lambda f: (_new_image("images/v00.jpg", 0, "image",
                                                       lambda rgb, p: Image.fromarray(rgb).save(p, quality=95))(f),
                                            _truncate("images/v00.jpg", 0.6)(f)), "image", "v00", "truncated"),
    "image_png_corrupt_data": Case(_corrupt_png_data("images/v01.png"), "image", "v01", "broken data stream"),
    "mask_png_corrupt_data": Case(_corrupt_png_data("masks/v02.png"), "mask", "v02", "broken data stream"),
    "mask_wrong_size": Case(_replace_image("masks/v00.png", _save_small_mask), "mask", "v00", "64x40"),
    "mask_empty": Case(_replace_image("masks/v03.png", _save_black_mask), "mask", "v03", "empty"),
    # --- mesh ---
    "mesh_truncated_ply": Case(_ply_truncated, "mesh", words="mesh.ply"),
    "mesh_truncated_obj": Case(_truncate("mesh.obj", 0.3), "mesh", words="cannot read mesh"),
    "mesh_point_cloud": Case(_mesh_edit(lambda t: _obj_lines(t, lambda ln: not ln.startswith("f "))), "mesh",
                             words="no faces"),
    "mesh_nan_vertex": Case(_mesh_edit(_first_v(lambda ln: "v nan 0.0 0.0")), "mesh", words="NaN"),
    "mesh_inf_vertex": Case(_mesh_edit(_first_v(lambda ln: "v inf 0.0 0.0")), "mesh", words="infinite"),
    "mesh_only_zero_area_faces": Case(_mesh_text("v 0 0 0\nv 1 0 0\nv 2 0 0\nf 1 2 3\nf 1 1 2\n"), "mesh",
                                      words="zero-area"),
    "mesh_uv_outside_unit_square": Case(_mesh_edit(_uv_edit("1.75 0.5")), "mesh", words="outside [0, 1]"),
    "mesh_uv_all_identical": Case(_mesh_edit(lambda t: "\n".join("vt 0.5 0.5" if ln.startswith("vt ") else ln
                                                                  for ln in t.splitlines()) + "\n"),
                                  "mesh", words="cover no area"),
    "mesh_uv_nan": Case(_mesh_edit(_uv_edit("nan 0.5")), "mesh", words="NaN"),
    "mesh_face_index_out_of_range": Case(_mesh_text("v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\nf 1 2 99\n"), "mesh",
                                         words="broken.obj"),
}


def _digest(folder: Path) -> dict[str, str]:
    """Relative path -> sha256 of every file (and link target) under `folder`."""
    out = {}
    for p in sorted(folder.rglob("*")):
        rel = str(p.relative_to(folder))
        if p.is_symlink():
            out[rel] = "link:" + os.readlink(p)
        elif p.is_file():
            out[rel] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


@dataclass
class Run:
    scene_yaml: Path
    returncode: int
    stdout: str
    stderr: str
    inputs_before: dict[str, str]
    inputs_after: dict[str, str]
    cwd_after: list[str]
    base_after: list[str]


def run_cli(scene_dir: Path, out: Path, cwd: Path, *extra: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYOPENGL_PLATFORM": "egl"}
    env.pop("HYDRA_FULL_ERROR", None)
    return subprocess.run([sys.executable, "-m", "featuretex.cli", f"scene={scene_dir / 'scene.yaml'}",
                           f"out={out}", "quiet=true", *extra], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=300)


def _run_case(name: str, good: Path, base: Path) -> Run:
    case = CASES[name]
    base.mkdir(parents=True)
    scene = base / "scene"
    shutil.copytree(good, scene, symlinks=True)
    case.break_it(scene)
    before = _digest(base)   # the scene and anything placed beside it (the 'outside' file)
    cwd = base / "cwd"
    cwd.mkdir()
    p = run_cli(scene, base / "out", cwd)
    listing = sorted(x.name for x in base.iterdir())
    def inputs(d: dict[str, str]) -> dict[str, str]:
        return {k: v for k, v in d.items() if k.split("/")[0] not in ("out", "cwd")}

    return Run(scene / "scene.yaml", p.returncode, p.stdout, p.stderr, inputs(before), inputs(_digest(base)),
               sorted(os.listdir(cwd)), listing)


@pytest.fixture(scope="session")
def matrix_runs(request, good_scene, tmp_path_factory) -> dict[str, Run]:
    """Run the selected cases (all of them when a test about the whole matrix is selected), two CLI
    processes at a time (each spends ~2 s importing)."""
    items = request.session.items
    wanted = sorted({item.callspec.params["name"] for item in items
                     if "matrix_runs" in getattr(item, "fixturenames", ()) and hasattr(item, "callspec")
                     and "name" in item.callspec.params})
    if any(item.name == "test_matrix_messages_name_what_to_do" for item in items):
        wanted = sorted(CASES)
    root = tmp_path_factory.mktemp("bad")
    with ThreadPoolExecutor(max_workers=2) as pool:
        runs = dict(zip(wanted, pool.map(lambda n: _run_case(n, good_scene, root / n), wanted)))
    return runs


def test_good_scene_is_accepted(good_scene):
    """The unbroken scene loads, so each case below fails for the one thing it breaks."""
    scene = load_scene(good_scene / "scene.yaml")
    assert len(scene.manifest.fitted) == 3 and len(scene.manifest.heldout) == 1


def test_matrix_is_large_enough():
    assert len(CASES) >= 40  # the matrix covers every input file kind, not a handful of examples


@pytest.mark.parametrize("name", sorted(CASES))
def test_bad_input_is_refused_cleanly(name, matrix_runs):
    r = matrix_runs[name]
    case = CASES[name]
    assert r.returncode == 2, f"exit {r.returncode}\nstderr:\n{r.stderr}\nstdout:\n{r.stdout}"
    assert "Traceback" not in r.stderr + r.stdout
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, r.stderr
    msg = lines[0]
    assert msg.startswith("featuretex: ") and str(r.scene_yaml) in msg, msg
    if case.view:
        assert f"view '{case.view}'" in msg, msg
    if case.field:
        assert f"field '{case.field}'" in msg, msg
    assert case.words in msg, msg
    assert len(msg) < 400, f"{len(msg)} characters: a value is quoted whole"
    assert r.inputs_after == r.inputs_before, "an input file changed"
    assert r.cwd_after == [], f"written into the working folder: {r.cwd_after}"
    assert set(r.base_after) <= {"scene", "cwd", "out", "outside.png"}, r.base_after


# --------------------------------------------------------------------------------------------
# Inputs that are converted, not refused, checked against outside references
# --------------------------------------------------------------------------------------------
def _srgb_decode(x: np.ndarray) -> np.ndarray:
    # IEC 61966-2-1:1999 decoding, written out here independently of featuretex.scene.colour
    x = np.asarray(x, np.float64)
    return np.where(x <= 0.04045, x / 12.92, ((x + 0.055) / 1.055) ** 2.4)


def _png_with_exif_orientation(png: bytes, orientation: int) -> bytes:
    """Insert an eXIf chunk (PNG spec 1.5 extension; a TIFF header + IFD0 with tag 0x0112) after IHDR."""
    tiff = (b"MM\x00\x2a\x00\x00\x00\x08" + b"\x00\x01" + b"\x01\x12\x00\x03\x00\x00\x00\x01"
            + orientation.to_bytes(2, "big") + b"\x00\x00" + b"\x00\x00\x00\x00")
    chunk = len(tiff).to_bytes(4, "big") + b"eXIf" + tiff
    chunk += zlib.crc32(b"eXIf" + tiff).to_bytes(4, "big")
    ihdr_end = 8 + 8 + 13 + 4
    return png[:ihdr_end] + chunk + png[ihdr_end:]


@pytest.fixture()
def rgb16() -> np.ndarray:
    return np.random.default_rng(7).integers(0, 65536, (H, W, 3)).astype(np.uint16)


def test_16bit_rgb_png_and_tiff_keep_full_depth(tmp_path, rgb16):
    # reference: the values OpenCV wrote; Pillow alone would keep only the high byte of 16-bit RGB
    for ext in ("png", "tif"):
        p = tmp_path / f"a.{ext}"
        assert cv2.imwrite(str(p), rgb16[..., ::-1])
        lin = load_photo(p, "s.yaml", "v", (W, H))
        np.testing.assert_allclose(lin, _srgb_decode(rgb16 / 65535.0), atol=2e-6)
        if ext == "png":   # Pillow's own reading is the 8-bit one: show that it really differs
            pil = np.asarray(Image.open(p).convert("RGB"), np.float64) / 255.0
            assert np.abs(pil - rgb16 / 65535.0).max() > 1e-3


def test_16bit_grey_and_rgba(tmp_path, rgb16):
    p = tmp_path / "g.png"
    cv2.imwrite(str(p), rgb16[..., 0])
    lin = load_photo(p, "s.yaml", "v", (W, H))
    np.testing.assert_allclose(lin, np.repeat(_srgb_decode(rgb16[..., :1] / 65535.0), 3, axis=2), atol=2e-6)
    alpha = np.where(np.arange(W)[None, :] < W // 2, 65535, 0).astype(np.uint16).repeat(H, 0)
    q = tmp_path / "m.png"
    cv2.imwrite(str(q), np.dstack([rgb16[..., ::-1], alpha]))
    np.testing.assert_array_equal(load_mask(q, "s.yaml", "v", (W, H)), alpha > 0)  # alpha is the mask


def test_16bit_png_honours_exif_orientation(tmp_path, rgb16):
    # reference: Pillow's ImageOps.exif_transpose on an 8-bit copy carrying the same eXIf chunk
    ok, enc = cv2.imencode(".png", rgb16[..., ::-1])
    ok8, enc8 = cv2.imencode(".png", (rgb16 >> 8).astype(np.uint8)[..., ::-1])
    for orient in range(1, 9):
        p16, p8 = tmp_path / f"o{orient}.png", tmp_path / f"o{orient}_8.png"
        p16.write_bytes(_png_with_exif_orientation(enc.tobytes(), orient))
        p8.write_bytes(_png_with_exif_orientation(enc8.tobytes(), orient))
        ref = np.asarray(ImageOps.exif_transpose(Image.open(p8)), np.float64)
        got = decode_image(p16, "s.yaml", "v", "image")
        assert got.shape[:2] == ref.shape[:2]
        np.testing.assert_array_equal(np.floor(got * 65535.0 / 256.0 + 1e-6), ref)


@pytest.mark.parametrize("orient", range(1, 9))
def test_exif_rotated_jpeg_is_turned_upright(tmp_path, orient):
    # reference: Pillow's ImageOps.exif_transpose (EXIF 2.3 orientation tag 0x0112)
    rgb = np.random.default_rng(orient).integers(0, 256, (H, W, 3)).astype(np.uint8)
    exif = Image.Exif()
    exif[0x0112] = orient
    p = tmp_path / "o.jpg"
    Image.fromarray(rgb).save(p, exif=exif, quality=95)
    ref = np.asarray(ImageOps.exif_transpose(Image.open(p)), np.float32) / 255.0
    got = decode_image(p, "s.yaml", "v", "image")
    np.testing.assert_array_equal(got, ref)
    assert got.shape[:2] == ((W, H) if orient in (5, 6, 7, 8) else (H, W))


def test_grey_palette_rgba_tiff_photos_are_converted(tmp_path):
    rgb = np.random.default_rng(3).integers(0, 256, (H, W, 3)).astype(np.uint8)
    im = Image.fromarray(rgb)
    # reference for each: Pillow's own conversion of the same file to RGB, then IEC 61966-2-1
    for name, img in {"grey.png": im.convert("L"), "pal.png": im.convert("P"), "rgba.png": im.convert("RGBA"),
                      "rgb.tif": im, "grey.tif": im.convert("L")}.items():
        p = tmp_path / name
        img.save(p)
        ref = _srgb_decode(np.asarray(Image.open(p).convert("RGB"), np.float64) / 255.0)
        np.testing.assert_allclose(load_photo(p, "s.yaml", "v", (W, H)), ref, atol=2e-6, err_msg=name)


def test_mixed_quads_are_triangulated(tmp_path):
    # a unit square as one quad plus one triangle: 3 triangles, total area 1.5 (shoelace formula)
    p = tmp_path / "q.obj"
    p.write_text("v 0 0 0\nv 1 0 0\nv 1 1 0\nv 0 1 0\nv 2 0 0\nf 1 2 3 4\nf 2 5 3\n")
    m = load_mesh(p, "s.yaml")
    assert len(m.faces) == 3
    tri = m.vertices[m.faces]
    area = 0.5 * np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1).sum()
    assert area == pytest.approx(1.5, abs=1e-12)


def test_repeated_and_zero_area_faces_are_dropped(tmp_path):
    p = tmp_path / "d.obj"
    p.write_text("v 0 0 0\nv 1 0 0\nv 0 1 0\nv 2 0 0\nf 1 2 3\nf 2 3 1\nf 1 2 4\nf 1 1 3\n")
    m = load_mesh(p, "s.yaml")
    # f 2 3 1 repeats f 1 2 3; f 1 2 4 is collinear (zero area); f 1 1 3 repeats a corner
    assert len(m.faces) == 1


def test_pose_off_by_rounding_is_accepted_as_nearest_rotation():
    # reference: scipy's Rotation.from_matrix, which also returns the nearest rotation matrix
    from scipy.spatial.transform import Rotation

    R = Rotation.from_euler("xyz", [0.3, -1.1, 2.0]).as_matrix()
    noisy = R + np.random.default_rng(0).normal(0, 2e-6, (3, 3))
    pose = parse_pose(np.hstack([noisy, [[0.1], [0.2], [0.5]]]).tolist(), "s.yaml", "v")
    np.testing.assert_allclose(pose[:3, :3], Rotation.from_matrix(noisy).as_matrix(), atol=1e-9)
    assert np.linalg.det(pose[:3, :3]) == pytest.approx(1.0, abs=1e-12)


ESCAPING_NAME = "../../ESCAPED"


def _accepted_variants(folder: Path) -> None:
    """Grey, 16-bit RGB, palette and EXIF-rotated photos, an RGBA mask, quads and repeated faces."""
    d = _load(folder)
    rgb = {i: np.asarray(Image.open(folder / d["views"][i]["image"]).convert("RGB")) for i in range(4)}
    Image.fromarray(rgb[0]).convert("L").save(folder / "images" / "v00.png")
    cv2.imwrite(str(folder / "images" / "v01.png"), (rgb[1].astype(np.uint16) * 257)[..., ::-1])
    Image.fromarray(rgb[2]).convert("P").save(folder / "images" / "v02.png")
    exif = Image.Exif()
    exif[0x0112] = 8   # stored rotated 90 clockwise; upright = the camera's 64x48
    Image.fromarray(np.rot90(rgb[3], -1).copy()).save(folder / "images" / "v03.jpg", exif=exif, quality=95)
    d["views"][3]["image"] = "images/v03.jpg"
    d["views"][3]["name"] = ESCAPING_NAME        # view names are labels, never paths
    d["views"][0]["name"] = "/tmp/an absolute name"
    m = np.asarray(Image.open(folder / "masks" / "v01.png").convert("L"))
    Image.fromarray(np.dstack([np.full((H, W, 3), 90, np.uint8), m])).save(folder / "masks" / "v01.png")
    _save(folder, d)
    obj = (folder / "mesh.obj").read_text()
    faces = [ln for ln in obj.splitlines() if ln.startswith("f ")]
    (folder / "mesh.obj").write_text(obj + "\n".join(faces[:5]) + "\n")   # repeated faces


def test_accepted_variants_run_end_to_end(good_scene, tmp_path):
    scene = tmp_path / "scene"
    shutil.copytree(good_scene, scene)
    _accepted_variants(scene)
    before = _digest(scene)
    cwd = tmp_path / "cwd"
    cwd.mkdir()
    p = run_cli(scene, tmp_path / "out", cwd, *QUICK)
    assert p.returncode == 0, p.stderr
    assert "Traceback" not in p.stderr + p.stdout
    assert (tmp_path / "out" / "summary.json").is_file()
    assert _digest(scene) == before and os.listdir(cwd) == []
    assert sorted(os.listdir(tmp_path)) == ["cwd", "out", "scene"] and not Path("/tmp/an absolute name").exists()
    assert (tmp_path / "out" / "heldout" / f"{view_file_stem(ESCAPING_NAME)}_photo.png").is_file()
    # the rotated JPEG came out upright: compare with Pillow's exif_transpose of the same file
    loaded = load_scene(scene / "scene.yaml")
    v3 = loaded.view(ESCAPING_NAME)
    ref = _srgb_decode(np.asarray(ImageOps.exif_transpose(Image.open(v3.image)), np.float64) / 255.0)
    np.testing.assert_allclose(loaded.photo(v3), ref, atol=2e-6)


def test_matrix_messages_name_what_to_do(matrix_runs):
    """Most refusals carry a hint in brackets (what to do); a few are self-explanatory."""
    with_hint = [n for n, r in matrix_runs.items() if r.stderr.rstrip().endswith(")")]
    assert set(matrix_runs) == set(CASES)
    assert len(with_hint) >= 0.6 * len(matrix_runs), sorted(set(matrix_runs) - set(with_hint))


def test_decoder_raises_only_input_error_on_damaged_files(tmp_path, good_scene):
    """Every prefix of a PNG and a JPEG either decodes or raises InputError (nothing else)."""
    png = (good_scene / "images" / "v00.png").read_bytes()
    Image.open(good_scene / "images" / "v00.png").save(tmp_path / "j.jpg", quality=90)
    jpg = (tmp_path / "j.jpg").read_bytes()
    for data, ext in ((png, "png"), (jpg, "jpg")):
        for n in np.linspace(0, len(data), 25).astype(int):
            p = tmp_path / f"cut.{ext}"
            p.write_bytes(data[:n])
            try:
                decode_image(p, "s.yaml", "v", "image")
            except InputError:
                pass


# --------------------------------------------------------------------------------------------
# Read-only and full output folders
# --------------------------------------------------------------------------------------------
@contextlib.contextmanager
def tmpfs(folder: Path, options: str):
    """Mount a tmpfs with `options` (e.g. 'size=96k', 'ro') at `folder`; skip the test if not allowed."""
    folder.mkdir(parents=True, exist_ok=True)
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(folder)], capture_output=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here ({r.stderr.decode().strip() or 'no permission'})")
    try:
        yield folder
    finally:
        subprocess.run(["umount", "-l", str(folder)], capture_output=True)


def _files_are_whole(out: Path) -> None:
    """No temporary file of the atomic writer is left, and every output file reads back completely."""
    for p in out.rglob("*"):
        if not p.is_file() or p.parent.name == ".hydra" or p.suffix == ".log":
            continue
        assert not p.name.startswith("."), f"temporary file left behind: {p}"
        if p.suffix == ".npy":
            np.load(p)                     # numpy checks the header against the data length
        elif p.suffix == ".npz":
            dict(np.load(p))               # every member's zip CRC is checked on read
        elif p.suffix == ".png":
            Image.open(p).load()
        elif p.suffix == ".json":
            json.loads(p.read_text())


def test_check_output_dir_reports_a_read_only_folder(tmp_path):
    from featuretex.safety import check_output_dir

    with tmpfs(tmp_path / "ro", "ro,size=64k") as ro:
        with pytest.raises(OSError) as e:
            check_output_dir(ro / "run")
        assert e.value.errno == errno.EROFS and e.value.filename == str(ro / "run")
    check_output_dir(tmp_path / "fine" / "run")
    assert (tmp_path / "fine" / "run").is_dir() and os.listdir(tmp_path / "fine" / "run") == []



# --------------------------------------------------------------------------------------------
# The command line: settings, Hydra's own keys and the run folder. Each case is refused before any
# stage runs (and, but for the lock, before the run folder is made), with one line and exit 2.
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Command:
    args: tuple[str, ...]    # after scene=<the scene> out=<base>/<out> quiet=true
    words: tuple[str, ...]   # fragments the one line carries
    out: str = "out"         # where out= points, relative to the case's folder


COMMANDS: dict[str, Command] = {
    "unknown_key": Command(("fit.step=100",), ("unknown setting 'fit.step' (did you mean 'fit.steps'?)",)),
    "unknown_key_appended": Command(("+fit.step=100",), ("unknown setting 'fit.step'",)),
    "texture_size_huge": Command(("texture.size=100000",), ("'texture.size' = 100000", "16..16384")),
    "texture_size_negative": Command(("texture.size=-5",), ("'texture.size' = -5", "0 (automatic)")),
    "texture_bounds_zero": Command(("texture.max_size=0", "texture.min_size=0"), ("= 0", "16..16384")),
    "texture_bounds_crossed": Command(("texture.min_size=1024", "texture.max_size=512"),
                                      ("'texture.min_size' = 1024", "texture.max_size (512)")),
    "texture_bits_12": Command(("texture.bits=12",), ("'texture.bits' = 12", "8 or 16")),
    "seed_text": Command(("seed=abc",), ("'seed' = 'abc'", "whole number")),
    "eval_every_zero": Command(("fit.eval_every=0",), ("'fit.eval_every' = 0", ">= 1")),
    "checkpoint_every_zero": Command(("fit.checkpoint_every=0",), ("'fit.checkpoint_every' = 0", ">= 1")),
    "lr_nan": Command(("fit.lr=nan",), ("'fit.lr' = nan", "finite")),
    "threads_negative": Command(("fit.threads=-1",), ("'fit.threads' = -1", "0..4096")),
    "align_cell_zero": Command(("fit.align_cell_px=0",), ("'fit.align_cell_px' = 0.0", ">= 1")),
    "precision_unknown": Command(("fit.precision=half",), ("'fit.precision' = 'half'", "'bfloat16'")),
    "crop_below_ssim_window": Command(("fit.crop=8",), ("'fit.crop' = 8", "16..4096")),
    "batch_zero": Command(("fit.batch=0",), ("'fit.batch' = 0",)),
    "patch_even": Command(("diagnose.patch=4",), ("'diagnose.patch' = 4", "odd")),
    "export_format_unknown": Command(("export.formats=[fbx]",), ("'export.formats' = 'fbx'", "glb, obj")),
    "decoder_unknown": Command(("fit.decoder=huge",), ("'fit.decoder' = 'huge'", "texel-screen")),
    "photos_scale_above_one": Command(("photos.scale=1.5",), ("'photos.scale' = 1.5", "(0, 1]")),
    "photos_max_side_tiny": Command(("photos.max_side=10",), ("'photos.max_side' = 10", "64")),
    "launcher_unknown": Command(("hydra/launcher=bogus",), ("'hydra/launcher' = 'bogus'", "'pool'")),
    "launcher_no_jobs": Command(("-m", "hydra/launcher=pool", "hydra.launcher.n_jobs=0"),
                                ("'hydra.launcher.n_jobs' = 0",)),
    # the run folder is `out`, and only `out`
    "run_dir_elsewhere": Command(("hydra.run.dir=../elsewhere",), ("hydra.run.dir", "out=")),
    "sweep_dir_elsewhere": Command(("-m", "hydra.sweep.dir=../elsewhere"), ("hydra.sweep.dir",)),
    "output_subdir_escapes": Command(("hydra.output_subdir=../escaped",), ("hydra.output_subdir",)),
    "job_name_escapes": Command(("hydra.job.name=../../escaped",), ("hydra.job.name",)),
    "log_file_elsewhere": Command(("hydra.job_logging.handlers.file.filename=../escaped.log",),
                                  ("hydra.job_logging.handlers.file.filename", "outside the run folder")),
    "out_is_the_scene": Command((), ("is the scene folder",), out="scene"),
    "out_inside_the_scene": Command((), ("lies inside the scene folder",), out="scene/run"),
    "out_holds_the_scene": Command((), ("holds the scene folder",), out="."),
    # code from the command line: Hydra would instantiate these (featuretex's own write_text too)
    "callback_runs_code": Command(("+hydra.callbacks.w={_target_:featuretex.atomic.write_text,"
                                   "target:escaped.txt,text:x}",), ("hydra.callbacks.w._target_", "refused")),
    "log_handler_class": Command(("+hydra.job_logging.handlers.x={class:os.system}",),
                                 ("hydra.job_logging.handlers.x.class",)),
}


@pytest.fixture(scope="session")
def command_runs(request, good_scene, tmp_path_factory) -> dict[str, Run]:
    wanted = sorted({item.callspec.params["command"] for item in request.session.items
                     if hasattr(item, "callspec") and "command" in item.callspec.params})
    root = tmp_path_factory.mktemp("commands")

    def one(name: str) -> Run:
        case, base = COMMANDS[name], root / name
        base.mkdir()
        shutil.copytree(good_scene, base / "scene")
        before = _digest(base)
        (base / "cwd").mkdir()
        p = run_cli(base / "scene", base / case.out, base / "cwd", *case.args)
        listing = sorted(x.name for x in base.iterdir())
        return Run(base / "scene" / "scene.yaml", p.returncode, p.stdout, p.stderr, before, _digest(base),
                   sorted(os.listdir(base / "cwd")), listing)

    with ThreadPoolExecutor(max_workers=2) as pool:
        return dict(zip(wanted, pool.map(one, wanted)))


@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_bad_command_is_refused_before_anything_is_written(command, command_runs):
    r, case = command_runs[command], COMMANDS[command]
    assert r.returncode == 2, f"exit {r.returncode}\n{r.stderr}"
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("featuretex: ") and "Traceback" not in r.stdout, r.stderr
    for words in case.words:
        assert words in lines[0], lines[0]
    # nothing was written anywhere: not the run folder, not the working folder, not the scene
    assert r.inputs_after == r.inputs_before
    assert r.cwd_after == [] and r.base_after == ["cwd", "scene"], r.base_after


def test_read_only_output_folder_gives_one_line(good_scene, tmp_path):
    with tmpfs(tmp_path / "ro", "ro,size=64k") as ro:
        p = run_cli(good_scene, ro / "run", tmp_path)
    assert p.returncode == 3, p.stderr
    lines = [ln for ln in p.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and str(ro / "run") in lines[0] and "Traceback" not in p.stderr + p.stdout, p.stderr


def test_disk_full_gives_one_line_and_leaves_whole_files(good_scene, tmp_path):
    """A real full file system (tmpfs of 96 kB: .hydra/ fits, the G-buffers do not), then the same
    command again with room: it finishes, so nothing left behind was taken for a finished stage."""
    scene = tmp_path / "scene"
    shutil.copytree(good_scene, scene)
    before = _digest(scene)
    with tmpfs(tmp_path / "disk", "size=96k") as disk:
        out = disk / "run"
        p = run_cli(scene, out, tmp_path, *QUICK)
        assert p.returncode == 3, p.stderr
        lines = [ln for ln in p.stderr.splitlines() if ln.strip()]
        assert len(lines) == 1 and str(out) in lines[0], p.stderr
        assert "Traceback" not in p.stderr + p.stdout
        _files_are_whole(out)
        subprocess.run(["mount", "-o", "remount,size=64m", str(disk)], check=True)
        q = run_cli(scene, out, tmp_path, *QUICK)
        assert q.returncode == 0, q.stderr
        assert json.loads((out / "summary.json").read_text())["heldout"]
        _files_are_whole(out)
    assert _digest(scene) == before


def test_no_space_at_the_atomic_writer_leaves_no_partial_file(good_scene, tmp_path, monkeypatch):
    """The same without a mount: the atomic writer's fsync fails with ENOSPC on its third file."""
    import featuretex.atomic as atomic
    from featuretex.config import FeaturetexConfig
    from featuretex.pipeline import run_pipeline

    calls = {"n": 0}
    real_fsync = os.fsync

    def fsync(fd):
        calls["n"] += 1
        if calls["n"] >= 3:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_fsync(fd)

    monkeypatch.setattr(atomic.os, "fsync", fsync)
    out = tmp_path / "run"
    with pytest.raises(OSError) as e:
        run_pipeline(FeaturetexConfig(scene=str(good_scene / "scene.yaml"), quiet=True), out)
    assert e.value.errno == errno.ENOSPC and calls["n"] == 3
    assert len([p for p in out.rglob("*") if p.is_file()]) == 2   # the two finished writes
    _files_are_whole(out)
