"""scene.yaml's everyday conventions: camera_to_world poses, OpenGL camera axes, focal lengths in
millimetres, a given up direction.

Each convention is checked against an independent composition on random poses (scipy's Rotation
builds the poses; OpenCV's projectPoints, or the convention's own definition written out, projects
the points), and a scene written in every convention parses to the same cameras and poses as the
OpenCV world_to_camera one and gives the same held-out figures.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path

import cv2
import numpy as np
import pytest
import yaml
from scipy.spatial.transform import Rotation

from featuretex.errors import InputError
from featuretex.scene.manifest import read_manifest

W, H = 64, 48
N_POSES = 8
SENSOR_MM = 23.5                       # an APS-C sensor's width


def _folder(tmp: Path) -> Path:
    """A scene folder with the files a manifest names (contents are not read by read_manifest)."""
    (tmp / "images").mkdir(parents=True, exist_ok=True)
    (tmp / "mesh.obj").write_text("v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    for k in range(N_POSES):
        (tmp / "images" / f"v{k}.png").write_bytes(b"")
    return tmp


def _write(tmp: Path, cameras: dict, views: list[dict], **top) -> Path:
    doc = {"format": "featuretex-scene/1", "mesh": "mesh.obj", "unit": "meter", **top,
           "cameras": cameras, "views": views}
    path = tmp / "scene.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    return path


def _random_cameras(seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(N, 3, 3) camera-to-world rotations (scipy, uniform), (N, 3) camera centres, metres."""
    rng = np.random.default_rng(seed)
    return Rotation.random(N_POSES, random_state=seed).as_matrix(), rng.normal(0.0, 2.0, (N_POSES, 3))


def _points_in_front(rot_c2w: np.ndarray, centre: np.ndarray, forward: np.ndarray, rng) -> np.ndarray:
    """(20, 3) world points 1-3 m in front of a camera whose viewing direction in its own axes is
    `forward`, inside a narrow cone (so they project inside the image)."""
    local = np.concatenate([rng.uniform(-0.2, 0.2, (20, 2)), np.ones((20, 1))], axis=1) * rng.uniform(1, 3, (20, 1))
    local = local * [1, 1, forward[2]]                    # along +z or -z
    return local @ rot_c2w.T + centre


def _project_opencv(world: np.ndarray, rot_c2w: np.ndarray, centre: np.ndarray, K: np.ndarray) -> np.ndarray:
    """OpenCV's projectPoints with rvec/tvec of the inverse pose, composed by scipy."""
    r_w2c = Rotation.from_matrix(rot_c2w).inv()
    tvec = -r_w2c.apply(centre)
    px, _ = cv2.projectPoints(world.reshape(-1, 1, 3), r_w2c.as_rotvec(), tvec, K, np.zeros(5))
    return px.reshape(-1, 2)


def _project_opengl(world: np.ndarray, rot_c2w: np.ndarray, centre: np.ndarray, K: np.ndarray) -> np.ndarray:
    """The OpenGL convention's own definition: camera looks down -z, +y up, so a point at camera
    coordinates (x, y, z), z < 0, lands at (cx + fx x / -z, cy - fy y / -z) in the image (y down)."""
    p = (world - centre) @ rot_c2w                       # R^T (X - C), row vectors
    return np.stack([K[0, 2] + K[0, 0] * p[:, 0] / -p[:, 2], K[1, 2] - K[1, 1] * p[:, 1] / -p[:, 2]], 1)


def _pose_rows(rot: np.ndarray, t: np.ndarray) -> list[list[float]]:
    return [[*map(float, rot[i]), float(t[i])] for i in range(3)]


@pytest.mark.parametrize("axes", ["opencv", "opengl"])
@pytest.mark.parametrize("pose_key", ["world_to_camera", "camera_to_world"])
def test_each_convention_projects_like_an_independent_composition(tmp_path, axes, pose_key):
    rots, centres = _random_cameras(seed=2 * ["opencv", "opengl"].index(axes) + ["world_to_camera", "camera_to_world"].index(pose_key))
    focal_mm = 35.0
    f_px = focal_mm * W / SENSOR_MM                     # pinhole: pixels per mm on the sensor x mm
    K = np.array([[f_px, 0, 31.5], [0, f_px, 23.5], [0, 0, 1]])
    views = []
    for k, (r, c) in enumerate(zip(rots, centres)):
        pose = _pose_rows(r, c) if pose_key == "camera_to_world" else _pose_rows(r.T, -r.T @ c)
        views.append({"name": f"v{k}", "image": f"images/v{k}.png", "camera": "c", pose_key: pose})
    cams = {"c": {"model": "pinhole", "width": W, "height": H, "axes": axes, "focal_mm": focal_mm,
                  "sensor_width_mm": SENSOR_MM, "cx": 31.5, "cy": 23.5}}
    man = read_manifest(_write(_folder(tmp_path), cams, views))
    assert np.allclose(man.cameras["c"].K, K, rtol=1e-14)
    rng = np.random.default_rng(7)
    forward = np.array([0, 0, -1.0]) if axes == "opengl" else np.array([0, 0, 1.0])
    reference = _project_opengl if axes == "opengl" else _project_opencv
    for v, r, c in zip(man.views, rots, centres):
        world = _points_in_front(r, c, forward, rng)
        ours = v.camera.project(v.to_camera(world))
        assert np.all(v.to_camera(world)[:, 2] > 0)              # in front, in featuretex's own axes
        np.testing.assert_allclose(ours, reference(world, r, c, K), atol=1e-7)
        np.testing.assert_allclose(v.centre, c, atol=1e-12)       # camera centre where it was put


def _converted(man, axes: str, pose_key: str, focal: str) -> tuple[dict, list[dict]]:
    """The manifest's cameras and views written again in another convention (full float precision)."""
    flip = np.diag([1.0, -1.0, -1.0, 1.0]) if axes == "opengl" else np.eye(4)
    cams = {}
    for cid, cam in man.cameras.items():
        d = {"model": cam.model, "width": cam.width, "height": cam.height, "axes": axes}
        if focal == "mm":
            d |= {"focal_mm": cam.fx * SENSOR_MM / cam.width, "sensor_width_mm": SENSOR_MM}
        else:
            d |= {"fx": cam.fx, "fy": cam.fy}
        cams[cid] = d | {"cx": cam.cx, "cy": cam.cy}
    views = []
    for v in man.views:
        w2c = flip @ v.world_to_camera                   # into the camera's own axes
        pose = np.linalg.inv(w2c) if pose_key == "camera_to_world" else w2c
        d = {"name": v.name, "image": str(v.image.relative_to(man.root)), "camera": v.camera.id,
             pose_key: pose[:3].tolist(), "holdout": v.holdout}
        if v.mask is not None:
            d["mask"] = str(v.mask.relative_to(man.root))
        views.append(d)
    return cams, views


CONVENTIONS = [("opengl", "world_to_camera", "px"), ("opencv", "camera_to_world", "px"),
               ("opengl", "camera_to_world", "mm"), ("opencv", "world_to_camera", "mm")]


@pytest.fixture(scope="module")
def small_scene(tmp_path_factory) -> Path:
    from tests.test_report_fixtures import make_scene

    return make_scene(tmp_path_factory.mktemp("conv") / "scene", views=9, width=96, height=72)


def _rewrite(scene: Path, folder: Path, axes: str, pose_key: str, focal: str) -> Path:
    """`scene` in another convention, in its own folder (same mesh, photos and masks)."""
    import shutil

    shutil.copytree(scene.parent, folder)
    cams, views = _converted(read_manifest(scene), axes, pose_key, focal)
    return _write(folder, cams, views)


@pytest.mark.parametrize("axes,pose_key,focal", CONVENTIONS)
def test_a_scene_in_each_convention_parses_to_the_same_cameras(tmp_path, small_scene, axes, pose_key, focal):
    ref = read_manifest(small_scene)
    alt = read_manifest(_rewrite(small_scene, tmp_path / "alt", axes, pose_key, focal))
    for a, b in zip(ref.views, alt.views, strict=True):
        np.testing.assert_allclose(b.world_to_camera, a.world_to_camera, atol=1e-13)
        assert b.pose_key == pose_key and b.camera.axes == axes
        np.testing.assert_allclose(b.camera.K, a.camera.K, rtol=1e-14)
        assert (b.name, b.holdout, b.camera.width, b.camera.height) == (a.name, a.holdout, a.camera.width,
                                                                        a.camera.height)


@pytest.mark.slow
def test_a_scene_in_every_convention_gives_the_same_heldout_figures(tmp_path, small_scene):
    """One pipeline run on the OpenCV scene and one on the scene rewritten with OpenGL axes,
    camera_to_world poses and focal lengths in millimetres: held-out figures within 0.01 dB."""
    from featuretex.config import FeaturetexConfig
    from featuretex.pipeline import run_pipeline
    from tests.test_report_fixtures import FAST_FIT

    alt = _rewrite(small_scene, tmp_path / "alt", "opengl", "camera_to_world", "mm")
    figures = []
    for k, scene in enumerate((small_scene, alt)):
        cfg = FeaturetexConfig(scene=str(scene), quiet=True, report=False)
        cfg.texture.size = 64
        for key, value in FAST_FIT.items():
            setattr(cfg.fit, key, value)
        summary = run_pipeline(cfg, tmp_path / f"run{k}")
        figures.append(summary["heldout"])
        # the run says what it decided: the up axis (estimated from the camera ring: +z) and its glTF frame
        assert summary["up"] == [0.0, 0.0, 1.0] and summary["warnings"] == []
        assert "up axis" in [i["what"] for i in summary["inferred"]]
        assert np.allclose(summary["gltf_from_scene"], [[1, 0, 0, 0], [0, 0, 1, 0], [0, -1, 0, 0], [0, 0, 0, 1]])
        assert json.loads((tmp_path / f"run{k}" / "summary.json").read_text())["heldout"] == summary["heldout"]
    for method, scores in figures[0].items():
        for key, value in scores.items():
            if isinstance(value, float):
                assert abs(figures[1][method][key] - value) <= 0.01, (method, key, value, figures[1][method][key])


@pytest.mark.parametrize("cam,views_extra,fragment", [
    ({"fx": 80.0, "fy": 80.0, "focal_mm": 35.0, "sensor_width_mm": 23.5}, {}, "one way only"),
    ({"focal_mm": 35.0}, {}, "sensor_width_mm"),
    ({"fx": 80.0, "fy": 80.0, "axes": "blender"}, {}, "unknown camera axes"),
    ({"fx": 80.0, "fy": 80.0, "cx": 31.5}, {}, "cy"),
    ({"fx": 80.0, "fy": 80.0}, {"camera_to_world": [[1, 0, 0, 0], [0, 1, 0, 0], [0, 0, 1, 5]]}, "one way only"),
])
def test_mixed_conventions_are_refused(tmp_path, cam, views_extra, fragment):
    cams = {"c": {"model": "pinhole", "width": W, "height": H, **cam}}
    views = [{"name": f"v{k}", "image": f"images/v{k}.png", "camera": "c",
              "world_to_camera": [[1, 0, 0, 0], [0, 1, 0, 0], [0, 0, 1, 5]], **copy.deepcopy(views_extra)}
             for k in range(2)]
    with pytest.raises(InputError, match=fragment) as e:
        read_manifest(_write(_folder(tmp_path), cams, views))
    assert "\n" not in str(e.value)


def test_missing_principal_point_is_the_image_centre_and_said_so(tmp_path):
    cams = {"c": {"model": "pinhole", "width": W, "height": H, "fx": 80.0, "fy": 80.0}}
    views = [{"name": f"v{k}", "image": f"images/v{k}.png", "camera": "c",
              "world_to_camera": [[1, 0, 0, 0], [0, 1, 0, 0], [0, 0, 1, 5]]} for k in range(2)]
    man = read_manifest(_write(_folder(tmp_path), cams, views, up=[0, 0, 2]))
    assert (man.cameras["c"].cx, man.cameras["c"].cy) == ((W - 1) / 2, (H - 1) / 2)
    assert [what for what, _ in man.assumed] == ["principal point"]
    assert np.array_equal(man.up, [0.0, 0.0, 1.0])
    for bad in ([0, 0, 0], [0, 1], "z"):
        with pytest.raises(InputError, match="up"):
            read_manifest(_write(tmp_path, cams, views, up=bad))


def test_the_readme_example_poses_are_one_camera(tmp_path):
    """The README writes one camera four ways (both axes, both pose keys): each parses to the same
    world_to_camera, and that camera is the one the README describes - centre (0, -2, 0), looking
    along +y, upright in a +z-up scene (image down = -z) - composed here with scipy's Rotation."""
    import re

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    block = text.split("The same camera written four ways", 1)[1].split("```yaml", 1)[1].split("```", 1)[0]
    poses, axes = [], None
    for line in block.splitlines():
        if m := re.match(r"# axes: (\w+)", line.strip()):
            axes = m.group(1)
        elif m := re.match(r"(world_to_camera|camera_to_world): (\[.*\])", line.strip()):
            poses.append((axes, m.group(1), yaml.safe_load(m.group(2).split("#")[0])))
    assert sorted((a, k) for a, k, _ in poses) == sorted((a, k) for a in ("opencv", "opengl") for k in
                                                          ("world_to_camera", "camera_to_world"))
    # camera axes in the world: x right = +x, y down = -z, z forward = +y (columns of camera_to_world)
    c2w = Rotation.from_matrix(np.array([[1.0, 0, 0], [0, 0, 1], [0, -1, 0]]))
    expected = np.eye(4)
    expected[:3, :3] = c2w.inv().as_matrix()
    expected[:3, 3] = -c2w.inv().apply([0.0, -2.0, 0.0])
    for k, (ax, key, pose) in enumerate(poses):
        cams = {"c": {"model": "pinhole", "width": W, "height": H, "fx": 80.0, "fy": 80.0, "axes": ax}}
        views = [{"name": f"v{i}", "image": f"images/v{i}.png", "camera": "c", key: copy.deepcopy(pose)}
                 for i in range(2)]
        man = read_manifest(_write(_folder(tmp_path / str(k)), cams, views))
        np.testing.assert_allclose(man.views[0].world_to_camera, expected, atol=1e-12, err_msg=f"{ax} {key}")
