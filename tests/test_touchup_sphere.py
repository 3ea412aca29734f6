"""The touch-up on a sphere whose scan has a dent of known depth, photographed (by pyrender, an
independent OpenGL renderer) from exact cameras; the analytic unit sphere is the reference: the
distance of a point p to the true surface is | |p| - 1 |.

Rounds as the stage runs them (solve from the diagnosis, move, diagnose again), with the classical
bake standing in for the fit to keep the test short.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from featuretex import synth
from featuretex.bake.baseline import bake_baseline
from featuretex.diagnose import DiagnoseConfig, diagnose
from featuretex.raster.stage import build_gbuffers
from featuretex.raster.uvspace import rasterise_uv
from featuretex.scene.camera import Camera
from featuretex.scene.loaded import load_scene
from featuretex.touchup.config import TouchupConfig
from featuretex.touchup.evidence import grid_fields
from featuretex.touchup.stage import RoundState, solve_round

from test_diagnose import noise_texture

CENTRE = np.array([0.6, -0.8, 0.0])     # on the unit sphere, at the equator (seen by both rings)
RADIUS, DEPTH = 0.5, 0.06
CFG = DiagnoseConfig(max_grid=128)
SIZE = 2.0 * np.sqrt(3.0)               # bounding-box diagonal of the unit sphere
TOL = CFG.geometry_tol_fraction * SIZE  # the diagnosis's geometry tolerance


def sphere_views(n: int = 24) -> list:
    w, h = 200, 150
    cam = Camera("cam0", "pinhole", w, h, 1.1 * w, 1.1 * w, (w - 1) / 2, (h - 1) / 2)
    poses = synth.orbit_poses(n, 3.2, [-20.0, 15.0, 45.0], seed=3)
    return [(f"v{k:03d}", cam, p) for k, p in enumerate(poses)]


_BUILT: dict = {}


def scene_of(kind: str, tmp_path_factory):
    """(scene, G-buffers) of the unit sphere's photos with a dented ('dent') or exact scan."""
    if kind not in _BUILT:
        truth = synth.textured_sphere(1.0, noise_texture(256, 4), n_lat=48, n_lon=96)
        scan = synth.dent(truth, CENTRE, RADIUS, DEPTH) if kind == "dent" else truth
        views = sphere_views()
        shots = synth.render_views(truth, views, lit=False, texture_filter="mipmap")
        folder = tmp_path_factory.mktemp(f"sphere_{kind}")
        path = synth.write_scene(folder, scan, [s[0] for s in shots], [s[1] for s in shots], views,
                                 [False] * len(views), image_format="png", seed=4, noise_sigma=0.005)
        scene = load_scene(path)
        _BUILT[kind] = (scene, build_gbuffers(scene, folder / "cache", quiet=True)[0], folder)
    return _BUILT[kind]


def diagnosed(scene, gbuffers) -> RoundState:
    texels = rasterise_uv(scene.mesh, 128)
    tex = bake_baseline(scene, gbuffers, texels).texture_lin
    dg = diagnose(scene, gbuffers, texels, tex, CFG)
    return RoundState(0, scene.mesh, np.zeros(len(scene.mesh.vertices)), tex, grid_fields(dg.work),
                      {**dg.summary_fields(), "figures": dg.figures})


def touch_up(kind: str, tmp_path_factory, rounds: int = 2):
    scene, gbuffers, folder = scene_of(kind, tmp_path_factory)
    st = diagnosed(scene, gbuffers)
    half = st.summary["figures"]["sweep_half_range"]
    for _ in range(rounds):
        mesh, offset, movable, n = solve_round(st, scene, TouchupConfig(), CFG, half)
        if n == 0:
            break
        moved = dataclasses.replace(scene, mesh=mesh)
        g, _ = build_gbuffers(moved, folder / "cache", quiet=True)
        nxt = diagnosed(moved, g)
        nxt.fields["movable"] = movable | st.fields.get("movable", False)
        st = dataclasses.replace(nxt, offset=offset)
    return scene, st


def test_dent_depth_restored(tmp_path_factory):
    scene, st = touch_up("dent", tmp_path_factory)
    before = np.linalg.norm(scene.mesh.vertices, axis=1)
    after = np.linalg.norm(st.mesh.vertices, axis=1)
    unit = scene.mesh.vertices / before[:, None]
    profile = synth.dent_profile(np.linalg.norm(unit - CENTRE, axis=1), RADIUS) * (unit @ CENTRE > 0)
    core = profile > 0.9
    assert core.sum() >= 5
    # the analytic sphere: depth of the dent before (DEPTH x profile) and what the touch-up put back,
    # as the median over the dent's middle (every vertex there within 30 %)
    restored = (after - before)[core] / (DEPTH * profile[core])
    assert abs(np.median(restored) - 1.0) <= 0.2, restored
    assert np.all(np.abs(restored - 1.0) <= 0.3), restored
    rest = np.linalg.norm(unit - CENTRE, axis=1) > 1.25 * RADIUS
    assert np.abs(after[rest] - 1.0).max() <= 0.1 * TOL
    # topology and UVs as they were (no subdivision was needed at this mesh resolution)
    assert np.array_equal(st.mesh.faces, scene.mesh.faces) and np.array_equal(st.mesh.uv, scene.mesh.uv)


def test_exact_geometry_does_not_move(tmp_path_factory):
    scene, st = touch_up("exact", tmp_path_factory, rounds=1)
    assert np.abs(st.mesh.vertices - scene.mesh.vertices).max() <= 0.1 * TOL


def test_pipeline_touchup_outputs_and_resume(tmp_path_factory):
    """`touchup=true` end to end on the dented sphere (short fits): the files of touchup/, the
    touched-up glb under the Khronos glTF validator (tests/tools/validate_gltf.js), offsets.ply's
    `offset` property against the vertices it moved, heldout.touchup with the other methods' keys,
    and a re-run that skips every finished stage and ends with the same figures."""
    import json
    import os
    import subprocess
    import sys

    import trimesh

    from test_export import _validate

    scene, _, folder = scene_of("dent", tmp_path_factory)
    out = tmp_path_factory.mktemp("touchup_run") / "run"     # a run folder never lies in the scene folder
    args = [sys.executable, "-m", "featuretex.cli", f"scene={scene.manifest.path}", f"out={out}", "quiet=true",
            "report=false", "texture.size=128", "photos.scale=1", "fit.steps=30", "fit.crop=48", "fit.batch=2", "fit.rebake_at=0",
            "fit.eval_every=30", "diagnose.max_grid=128", "touchup=true", "touchup_settings.fit_steps=10",
            "touchup_settings.rebake_at=0", "touchup_settings.rounds=1", "touchup_settings.min_gain_db=-100"]
    env = {**os.environ, "PYOPENGL_PLATFORM": "egl"}
    root = Path(__file__).resolve().parents[1]
    r = subprocess.run(args, cwd=root, env=env, capture_output=True, text=True, timeout=1200)
    assert r.returncode == 0, r.stderr[-3000:]
    s = json.loads((out / "summary.json").read_text())
    assert set(s["heldout"]["touchup"]) == set(s["heldout"]["baked"])
    t = s["touchup"]
    assert t["moved_vertices"] > 0 and t["result_round"] == 1
    for name in ("model.glb", "model.obj", "model.mtl", "texture.png", "offsets.ply"):
        assert (out / "touchup" / name).is_file(), name
    report = _validate(out / "touchup" / "model.glb")
    assert report["issues"]["numErrors"] == 0, report["issues"]["messages"][:5]
    ply = trimesh.load(out / "touchup" / "offsets.ply", process=False)
    offset = np.asarray(ply.metadata["_ply_raw"]["vertex"]["data"]["offset"], np.float64)
    moved = np.asarray(ply.vertices) - scene.mesh.vertices
    np.testing.assert_allclose(np.einsum("ij,ij->i", moved, scene.mesh.normals), offset, atol=1e-6)
    assert np.abs(offset).max() == pytest.approx(t["offset_max"], abs=1e-6)
    stages = json.loads((out / "stages.json").read_text())
    r2 = subprocess.run(args, cwd=root, env=env, capture_output=True, text=True, timeout=1200)
    assert r2.returncode == 0, r2.stderr[-3000:]
    assert json.loads((out / "stages.json").read_text())["touchup1"] == stages["touchup1"]
    assert json.loads((out / "summary.json").read_text())["heldout"]["touchup"] == s["heldout"]["touchup"]
