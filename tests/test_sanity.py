"""Scene checks before any expensive stage: evidence against most views stops the run, evidence
against one view is a warning. Silhouettes come from featuretex's Embree caster at a coarse size;
the coarse camera is checked against OpenCV's area resize of the full image's pixel grid."""

from __future__ import annotations

import dataclasses
from pathlib import Path
from types import SimpleNamespace

import cv2
import numpy as np
import pytest
from PIL import Image

from featuretex import synth
from featuretex.errors import InputError
from featuretex.scene.camera import Camera
from featuretex.scene.loaded import load_scene
from featuretex.scene.manifest import View, read_manifest
from featuretex.scene.mesh import load_mesh
from featuretex.scene.sanity import check_centres_spread, coarse_view

W, H = 96, 72


@pytest.fixture(scope="module")
def scene_dir(tmp_path_factory) -> Path:
    """Eight views of a small sphere with masks (rendered by pyrender)."""
    folder = tmp_path_factory.mktemp("sanity") / "scene"
    mesh = synth.textured_sphere(0.1, synth.checker_texture(64, 4), n_lat=12, n_lon=24)
    cam = Camera("cam0", "pinhole", W, H, 90.0, 90.0, (W - 1) / 2, (H - 1) / 2)
    views = [(f"v{i:02d}", cam, p) for i, p in enumerate(synth.orbit_poses(8, 0.5, [20.0], seed=2))]
    shots = synth.render_views(mesh, views, lit=False)
    return synth.write_scene(folder, mesh, [s[0] for s in shots], [s[1] for s in shots], views,
                             [i % 4 == 3 for i in range(8)], image_format="png").parent


def test_coarse_camera_keeps_pixel_edges():
    """A point on the full image lands, in the coarse camera, where an area resize puts its pixel:
    pixel edges at -0.5 and W - 0.5 map onto -0.5 and w - 0.5 (pixel centres at integers)."""
    cam = Camera("c", "pinhole", 1000, 750, 1200.0, 1180.0, 510.2, 370.9)
    small = coarse_view(View("v", Path("x"), None, cam, np.eye(4))).camera
    assert (small.width, small.height) == (128, 96)
    pts = np.array([[0.1, -0.05, 1.0], [-0.3, 0.2, 2.0]])
    full, coarse = cam.project(pts), small.project(pts)
    np.testing.assert_allclose(coarse, (full + 0.5) * [128 / 1000, 96 / 750] - 0.5, atol=1e-9)
    # OpenCV's INTER_AREA (an exact 1000/8 = 125 px block average) agrees about where a pixel goes
    img = np.zeros((750, 1000), np.float32)
    img[400:408, 496:504] = 1.0                        # one coarse-sized block, centre (499.5, 403.5)
    r = cv2.resize(img, (125, 94), interpolation=cv2.INTER_AREA)
    y, x = np.unravel_index(np.argmax(r), r.shape)
    assert (x, y) == (62, 50)                          # (499.5 + 0.5) / 8 - 0.5 = 62, (403.5 + 0.5) / 8 - 0.5 = 50


def test_one_inverted_mask_is_a_warning_not_a_stop(scene_dir, tmp_path, caplog):
    import shutil

    folder = tmp_path / "scene"
    shutil.copytree(scene_dir, folder)
    p = folder / "masks" / "v02.png"
    Image.fromarray(255 - np.asarray(Image.open(p).convert("L")), "L").save(p)
    scene = load_scene(folder / "scene.yaml")
    assert len(scene.warnings) == 1 and "v02" in scene.warnings[0] and "invert the masks" in scene.warnings[0]
    assert "invert the masks" in caplog.text
    # the unbroken scene has none
    assert load_scene(scene_dir / "scene.yaml").warnings == []


def test_inverted_poses_cluster_the_camera_centres(scene_dir):
    """camera_to_world matrices written as world_to_camera put every camera near one point."""
    man = read_manifest(scene_dir / "scene.yaml")
    mesh = load_mesh(man.mesh, "scene.yaml")
    check_centres_spread(man, mesh)                    # the good poses pass
    wrong = [View(v.name, v.image, v.mask, v.camera, np.linalg.inv(v.world_to_camera)) for v in man.views]
    with pytest.raises(InputError, match="under 'camera_to_world'") as e:
        check_centres_spread(dataclasses.replace(man, views=tuple(wrong)), mesh)
    assert "one point" in str(e.value) and "v00" in str(e.value)


def test_report_lists_warnings_and_assumptions():
    from featuretex.report.html import assumptions_html

    run = SimpleNamespace(summary={"warnings": ["view 'v02', field 'mask': odd <mask>"],
                                   "inferred": [{"what": "up axis", "detail": "estimated & snapped"}]})
    page = assumptions_html(run)
    assert "v02" in page and "&lt;mask&gt;" in page and "up axis" in page and "estimated &amp; snapped" in page
    assert assumptions_html(SimpleNamespace(summary={})) == ""


def test_one_photo_that_is_a_mask_is_a_warning(scene_dir, tmp_path):
    """A view without a mask whose image is a black-and-white silhouette (the mask file named as the
    photo): one view of eight is a warning naming it; the real photos (pyrender's renders of a
    checker-textured sphere) are not taken for masks."""
    import shutil

    import yaml

    folder = tmp_path / "scene"
    shutil.copytree(scene_dir, folder)
    doc = yaml.safe_load((folder / "scene.yaml").read_text())
    for v in doc["views"]:
        mask = v.pop("mask")
        if v["name"] == "v05":
            v["image"] = mask
    (folder / "scene.yaml").write_text(yaml.safe_dump(doc, sort_keys=False))
    scene = load_scene(folder / "scene.yaml")
    assert len(scene.warnings) == 1 and "v05" in scene.warnings[0] and "looks like a mask" in scene.warnings[0]


def test_inferred_lists_what_the_run_decided():
    """summary.json's `inferred`: estimated up, generated atlas, views without masks (from the views as
    written), an automatic texture size, the working resolution summed up from its per-view record."""
    from featuretex.inferred import inferred_items

    views = [SimpleNamespace(name=f"v{i}", mask=None if i in (2, 5) else Path("m.png")) for i in range(8)]
    scene = SimpleNamespace(original=SimpleNamespace(views=views, assumed=(("principal point", "centre"),)),
                            up=SimpleNamespace(estimated=True, detail="up [0, 0, 1] estimated"),
                            mesh=SimpleNamespace(uv_generated=True))
    wr = {v.name: {"scale": 0.25 if i < 6 else 1.0} for i, v in enumerate(views)}
    items = {i["what"]: i["detail"] for i in inferred_items(scene, 512, False, {"working_resolution": wr})}
    assert list(items) == ["principal point", "up axis", "UV atlas", "masks", "texture size", "working resolution"]
    assert items["masks"].startswith("2 of 8 views have no mask (v2, v5)")
    assert "512 x 512" in items["texture size"] and items["working resolution"].startswith("6 of 8 photos")
    assert "0.25 of their resolution" in items["working resolution"]
    scene.up.estimated, scene.mesh.uv_generated = False, False
    scene.original.views[2].mask = Path("m.png")
    items = {i["what"]: i["detail"] for i in inferred_items(scene, 512, True, {"working_resolution": {"v0": {"scale": 1.0}}})}
    assert list(items) == ["principal point", "masks", "working resolution"]
    assert items["masks"].startswith("1 of 8 views has no mask (v5)") and "that photo gives" in items["masks"]
    assert items["working resolution"].startswith("all 1 photos are worked on at their full resolution")
