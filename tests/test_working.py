"""Working resolution: the crop + area-filter arithmetic against OpenCV, and a run on photos larger
than the texture can use.

References: cv2.projectPoints (pinhole + Brown-Conrady in OpenCV's coefficient order) for the
camera of a working image; cv2.resize with INTER_AREA (pixel-area weights) and a plain block mean
for the reduction; the IEC 61966-2-1 sRGB curve written out here for the linear-light decoding.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import cv2
import numpy as np
import pytest

from featuretex.scene.camera import Camera
from featuretex.scene.images import linear_table
from featuretex.scene.resample import Window, reduce_levels, reduce_mask, reduced_size, working_camera


def iec_decode(code: np.ndarray) -> np.ndarray:
    """IEC 61966-2-1 sRGB -> linear, float64 (the standard's piecewise curve)."""
    c = np.asarray(code, np.float64)
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def _random_camera(rng: np.random.Generator, w: int = 4000, h: int = 3000) -> Camera:
    return Camera("cam0", "brown", w, h, fx=rng.uniform(2500, 4000), fy=rng.uniform(2500, 4000),
                  cx=(w - 1) / 2 + rng.uniform(-40, 40), cy=(h - 1) / 2 + rng.uniform(-40, 40),
                  distortion=(rng.uniform(-0.1, 0.1), rng.uniform(-0.05, 0.05), rng.uniform(-1e-3, 1e-3),
                              rng.uniform(-1e-3, 1e-3), rng.uniform(-0.01, 0.01)))


@pytest.mark.parametrize("seed", range(4))
def test_working_camera_projects_like_opencv(seed):
    """cv2.projectPoints with the photo's K and distortion, mapped into the working image by
    x' = (x - x0 + 0.5) / s - 0.5, equals projectPoints with the working camera's K (same
    coefficients) and our own projection with it."""
    rng = np.random.default_rng(seed)
    cam = _random_camera(rng)
    x0, y0 = int(rng.integers(0, 900)), int(rng.integers(0, 700))
    x1, y1 = int(rng.integers(x0 + 800, cam.width + 1)), int(rng.integers(y0 + 600, cam.height + 1))
    win = Window(x0, y0, x1, y1, *reduced_size((x0, y0, x1, y1), float(rng.uniform(1.0, 5.0))))
    wcam = working_camera(cam, win)
    pts = np.stack([rng.uniform(-0.4, 0.4, 500), rng.uniform(-0.3, 0.3, 500), rng.uniform(1.0, 3.0, 500)], 1)
    dist = np.array(cam.distortion)
    full, _ = cv2.projectPoints(pts, np.zeros(3), np.zeros(3), cam.K, dist)      # OpenCV, photo pixels
    mapped = win.to_working(full.reshape(-1, 2))
    direct, _ = cv2.projectPoints(pts, np.zeros(3), np.zeros(3), wcam.K, dist)   # OpenCV, working camera
    np.testing.assert_allclose(direct.reshape(-1, 2), mapped, atol=1e-7)
    np.testing.assert_allclose(wcam.project(pts), mapped, atol=1e-7)
    sx, sy = win.factors
    assert wcam.distortion == cam.distortion and (wcam.width, wcam.height) == (win.width, win.height)
    assert wcam.fx == pytest.approx(cam.fx / sx) and wcam.fy == pytest.approx(cam.fy / sy)


def test_reduction_is_the_area_filter_in_linear_light():
    """Non-whole factor: cv2.resize INTER_AREA of the IEC-decoded crop (float64); whole factor: the
    block mean. Our 16-bit result decodes to both within its quantisation (< 3e-5 linear)."""
    rng = np.random.default_rng(1)
    photo = rng.integers(0, 256, (300, 400, 3), dtype=np.uint8)
    win = Window(37, 21, 390, 290, *reduced_size((37, 21, 390, 290), 2.7))
    ours = reduce_levels(photo, win)
    assert ours.dtype == np.uint16 and ours.shape == (win.height, win.width, 3)
    crop = iec_decode(photo[21:290, 37:390] / 255.0)
    ref = cv2.resize(crop, (win.width, win.height), interpolation=cv2.INTER_AREA)
    np.testing.assert_allclose(linear_table("uint16")[ours], ref, atol=3e-5)
    # whole factor 3: each working pixel is the mean of a 3x3 block in linear light
    win3 = Window(10, 0, 400, 300, 130, 100)
    block = iec_decode(photo[:, 10:] / 255.0).reshape(100, 3, 130, 3, 3).mean(axis=(1, 3))
    np.testing.assert_allclose(linear_table("uint16")[reduce_levels(photo, win3)], block, atol=3e-5)
    # not reduced: the crop's own code values, dtype kept
    same = reduce_levels(photo, Window(5, 6, 105, 206, 100, 200))
    assert same.dtype == np.uint8 and np.array_equal(same, photo[6:206, 5:105])


def test_reduced_mask_and_photo_stay_registered():
    """A disk drawn at photo resolution lands where the camera arithmetic says: the reduced mask's
    centroid and the reduced photo's brightness centroid both sit at x' = (x - x0 + 0.5) / s - 0.5,
    and the mask keeps the disk's area (area average thresholded at 0.5)."""
    H, W = 1200, 1600
    yy, xx = np.mgrid[0:H, 0:W]
    cx, cy, r = 903.3, 517.8, 211.0
    disk = (xx - cx) ** 2 + (yy - cy) ** 2 <= r * r
    photo = np.where(disk[..., None], 230, 20).astype(np.uint8).repeat(3, 2)
    win = Window(500, 200, 1400, 900, *reduced_size((500, 200, 1400, 900), 3.4))
    m = reduce_mask(disk, win)
    want = win.to_working(np.array([[cx, cy]]))[0]
    ys, xs = np.nonzero(m)
    assert abs(xs.mean() - want[0]) < 0.1 and abs(ys.mean() - want[1]) < 0.1
    sx, sy = win.factors
    assert m.sum() == pytest.approx(np.pi * r * r / (sx * sy), rel=0.01)
    lin = linear_table("uint16")[reduce_levels(photo, win)][..., 0]
    wgt = lin - lin.min()
    gy, gx = np.mgrid[0:win.height, 0:win.width]
    assert abs((wgt * gx).sum() / wgt.sum() - want[0]) < 0.02 and abs((wgt * gy).sum() / wgt.sum() - want[1]) < 0.02


# --------------------------------------------------------------------------------------------
# A scene whose photos hold more pixels than its texture can use
# --------------------------------------------------------------------------------------------
def _config(scene: Path, **photos):
    from featuretex.config import FeaturetexConfig
    from featuretex.diagnose.config import DiagnoseConfig
    from featuretex.fit.config import FitConfig
    from featuretex.working import PhotoConfig

    cfg = FeaturetexConfig(scene=str(scene), quiet=True, report=False, photos=PhotoConfig(**photos),
                           fit=FitConfig(steps=60, eval_every=30, crop=32, batch=2, threads=1, rebake_at=50),
                           diagnose=DiagnoseConfig(max_grid=64, min_grid=32))
    cfg.texture.size = 128
    return cfg


@pytest.fixture(scope="module")
def big_photos(tmp_path_factory):
    """A sphere photographed at 320x240 (about 3.8 photo pixels per texel edge of a 128 texture, so
    reduced to about 2),
    run at working resolution and at full resolution (photos.scale=1)."""
    from featuretex.pipeline import run_pipeline
    from tests.scenes import smooth_texture, sphere_scene

    base = tmp_path_factory.mktemp("working")
    scene, _ = sphere_scene(base / "scene", texture=smooth_texture(128, seed=2), n_views=12, size=(320, 240))
    work = run_pipeline(_config(scene), base / "work")
    full = run_pipeline(_config(scene, scale=1.0), base / "full")
    return scene, base, work, full


def test_stages_run_on_the_reduced_images(big_photos):
    """Every view is reduced; the G-buffers, the fit's alignment fields and the held-out photos the
    scores compare with all have the working sizes summary.json reports."""
    from PIL import Image

    _, base, work, full = big_photos
    wr = work["working_resolution"]
    assert set(wr) == {f"v{k:03d}" for k in range(12)}
    for name, w in wr.items():
        x0, y0, x1, y1 = w["crop"]
        assert 0 <= x0 < x1 <= 320 and 0 <= y0 < y1 <= 240
        assert 0.45 < w["scale"] < 0.6 and w["size"][0] < x1 - x0       # ~2 / 3.8
        assert full["working_resolution"][name]["scale"] == 1.0
    sizes = {tuple(w["size"]) for w in wr.values()}
    shapes = {np.load(p, mmap_mode="r").shape[::-1] for p in (base / "work" / "cache" / "gbuffer").glob("*.npy")}
    assert shapes <= sizes and len(shapes) == len(sizes)
    with np.load(base / "work" / "fit" / "corrections.npz") as z:
        assert {n: list(s) for n, s in zip(z["views"], z["image_size"])} == {n: w["size"] for n, w in wr.items()}
    for name in ("v003", "v007", "v011"):       # the held-out views
        with Image.open(base / "work" / "heldout" / f"{name}_photo.png") as im:
            assert list(im.size) == wr[name]["size"]
    plan = json.loads((base / "work" / "stages" / "working.json").read_text())
    assert plan["texture_size"] == 128 and plan["views"]["v000"]["crop"] == wr["v000"]["crop"]


def test_working_resolution_keeps_the_held_out_figures(big_photos):
    """About two working pixels per texel edge lose little against the full photos: held-out PSNR of the
    baked texture within 0.5 dB, and the two baked textures agree (PSNR > 30 dB between them)."""
    from PIL import Image

    _, base, work, full = big_photos
    for method in ("baseline", "baked"):
        assert abs(work["heldout"][method]["psnr"] - full["heldout"][method]["psnr"]) < 0.5, (method, work, full)
    a = np.asarray(Image.open(base / "work" / "texture.png"), np.float64) / 255
    b = np.asarray(Image.open(base / "full" / "texture.png"), np.float64) / 255
    assert 10 * np.log10(1 / np.mean((a - b) ** 2)) > 30


def test_reduced_photos_are_cached_by_content(big_photos, tmp_path):
    """A second run finds every reduced photo; a changed photo (and only it) is reduced again."""
    from featuretex.scene.loaded import load_scene
    from featuretex.working import WorkingPlan, working_scene

    scene_yaml, base, work, _ = big_photos
    cache = base / "work" / "cache" / "photos"
    before = {p.name: p.stat().st_mtime_ns for p in cache.glob("*.png")}
    plan = WorkingPlan.from_json(json.loads((base / "work" / "stages" / "working.json").read_text()))
    _, written = working_scene(load_scene(scene_yaml), plan, cache)
    assert written == 0 and {p.name: p.stat().st_mtime_ns for p in cache.glob("*.png")} == before
    # a copy of the scene with one photo changed, reusing the same cache
    copy = tmp_path / "scene"
    shutil.copytree(scene_yaml.parent, copy)
    img = copy / "images" / "v001.png"
    a = cv2.imread(str(img))
    cv2.imwrite(str(img), 255 - a)
    derived, written = working_scene(load_scene(copy / "scene.yaml"), plan, cache)
    assert written == 1
    assert derived.view("v001").image.name not in before
    assert sum(v.image.name in before for v in derived.views) == 11


def test_mask_and_crop_agree_with_the_mesh(big_photos):
    """The reduced mask and the working camera's G-buffer outline the same sphere (IoU > 0.95; the
    scene's masks are pyrender's coverage, made at photo resolution), and each crop holds the
    object with its margin."""
    from featuretex.raster.cache import load_or_render
    from featuretex.raster.embree import EmbreeRasteriser
    from featuretex.scene.loaded import load_scene
    from featuretex.working import WorkingPlan, working_scene

    scene_yaml, base, _, _ = big_photos
    plan = WorkingPlan.from_json(json.loads((base / "work" / "stages" / "working.json").read_text()))
    derived, _ = working_scene(load_scene(scene_yaml), plan, base / "work" / "cache" / "photos")
    ras = EmbreeRasteriser(derived.mesh)
    for v in derived.views:
        mask = derived.photo_mask(v)
        cover = ras.render(v)["tri"] >= 0
        assert mask.shape == cover.shape == (v.camera.height, v.camera.width)
        assert (mask & cover).sum() / (mask | cover).sum() > 0.95, v.name
        orig = derived.original.views[[o.name for o in derived.original.views].index(v.name)]
        full_mask = derived.photo_mask(orig)
        ys, xs = np.nonzero(full_mask)
        x0, y0, x1, y1 = plan.views[v.name].window.box
        assert x0 <= xs.min() and xs.max() < x1 and y0 <= ys.min() and ys.max() < y1
