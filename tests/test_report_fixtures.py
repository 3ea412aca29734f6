"""Shared helpers for the report and batch tests: a tiny synthetic scene and a real run of it.

The scene's mesh carries a dent the photos do not show (they are rendered from the true sphere),
so the diagnosis has a geometry error to find. `make_run_dir` runs the real command on the scene;
with `complete=True` it adds, only where the pipeline has not written them yet, the artefacts of
stages not yet wired into it: the real diagnosis (featuretex.diagnose) of the baseline texture,
model.glb from the real glTF exporter, and stand-ins for the fit: baked/neural held-out renders and
scores copied from the baseline, and an invented fit history (test data, never demo output).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = ROOT / "test-artifacts"
ENV = {**os.environ, "PYOPENGL_PLATFORM": "egl", "HYDRA_FULL_ERROR": "1"}
# a fit just long enough to leave a history: the report is under test here, not the fit
FAST_FIT = {"steps": 4, "eval_every": 2, "crop": 32, "batch": 2, "threads": 1}


def make_scene(folder: Path, *, views: int = 12, width: int = 128, height: int = 96) -> Path:
    """A checker-textured sphere photographed from an orbit (pyrender, unlit); every third view held
    out. Returns the scene.yaml path."""
    from featuretex import synth
    from featuretex.scene.camera import Camera

    truth = synth.textured_sphere(0.5, synth.checker_texture(128, 8), n_lat=24, n_lon=48)
    scan = synth.dent(truth, (0.5, 0.0, 0.0), 0.3, 0.08)
    cam = Camera("cam0", "pinhole", width, height, 1.15 * width, 1.15 * width, (width - 1) / 2, (height - 1) / 2)
    poses = synth.orbit_poses(views, 2.0, [-40, 0, 40], seed=1)
    specs = [(f"v{i:03d}", cam, p) for i, p in enumerate(poses)]
    shots = synth.render_views(truth, specs, lit=False)
    return synth.write_scene(folder, scan, [s[0] for s in shots], [s[1] for s in shots], specs,
                             [i % 3 == 2 for i in range(views)], image_format="png")


def featuretex_cmd(*args: str) -> list[str]:
    """The featuretex command (module form: the same Hydra app and config as the console script)."""
    return [sys.executable, "-m", "featuretex.cli", *args]


def run_cli(*args: str, timeout: float = 300) -> subprocess.CompletedProcess:
    return subprocess.run(featuretex_cmd(*args), cwd=ROOT, env=ENV, capture_output=True, text=True,
                          timeout=timeout)


def make_run_dir(base: Path, *, complete: bool = True) -> Path:
    scene = make_scene(base / "scene")
    run = base / "run"
    r = run_cli(f"scene={scene}", f"out={run}", "quiet=true", "texture.size=128",
                *(f"fit.{k}={v}" for k, v in FAST_FIT.items()))
    assert r.returncode == 0, r.stderr[-3000:]
    if complete:
        _complete(run, scene.parent)
    return run


def _complete(run: Path, scene_dir: Path) -> None:
    from featuretex.export.gltf import write_glb
    from featuretex.scene.mesh import load_mesh

    if not (run / "texture.png").exists():
        shutil.copy(run / "baseline_texture.png", run / "texture.png")
    if not (run / "model.glb").exists():
        write_glb(run / "model.glb", load_mesh(scene_dir / "mesh.obj", "scene.yaml"), (run / "texture.png").read_bytes())
    summary = json.loads((run / "summary.json").read_text())
    for method in ("baked", "neural"):
        if method not in summary["heldout"]:
            summary["heldout"][method] = dict(summary["heldout"]["baseline"])
            summary["heldout_per_view"][method] = json.loads(json.dumps(summary["heldout_per_view"]["baseline"]))
            for png in (run / "heldout").glob("*_baseline.png"):
                shutil.copy(png, png.with_name(png.name.replace("_baseline", f"_{method}")))
    if not (run / "error_map.npz").exists():
        summary.update(_diagnose(run, Path(summary["scene"]), summary["texture_size"]))
    (run / "summary.json").write_text(json.dumps(summary, indent=2))
    hist = run / "fit" / "history.json"
    if not hist.exists():
        steps = list(range(0, 201, 20))
        hist.parent.mkdir(exist_ok=True)
        hist.write_text(json.dumps({
            "step": steps, "loss": [0.1 * 0.985 ** s for s in steps],
            "heldout_psnr": [13.0 + 6.0 * (1 - 0.985 ** s) for s in steps],
            "heldout_ssim": [0.6 + 0.2 * (1 - 0.985 ** s) for s in steps], "elapsed_s": steps,
            "train": {"step": list(range(0, 201, 10)), "loss": [0.12 * 0.985 ** s for s in range(0, 201, 10)]}}))


def _diagnose(run: Path, scene_file: Path, size: int) -> dict:
    """The real diagnosis of the baseline texture, written into the run dir; its summary fields."""
    from featuretex.diagnose import diagnose, write_outputs
    from featuretex.raster.stage import build_gbuffers
    from featuretex.raster.uvspace import rasterise_uv
    from featuretex.scene.loaded import load_scene

    scene = load_scene(scene_file)
    gbuffers, _ = build_gbuffers(scene, run / "cache" / "gbuffer", quiet=True)
    texels = rasterise_uv(scene.mesh, size)
    with np.load(run / "stages" / "baseline.npz") as z:
        texture = np.asarray(z["texture_lin"], np.float32)
    dg = diagnose(scene, gbuffers, texels, texture)
    write_outputs(run, dg, scene, texels)
    return dg.summary_fields()
