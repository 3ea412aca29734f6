"""Shared helpers for the report and batch tests: a tiny synthetic scene and a real run of it.

The scene's mesh carries a dent the photos do not show (they are rendered from the true sphere),
so the diagnosis has a geometry error to find. `make_run_dir` runs the real command on the scene
with a short fit; the report tests read only what that run wrote (the session fixture
`pipeline_run` in conftest.py makes one such run for all of them).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = ROOT / "test-artifacts"
ENV = {**os.environ, "PYOPENGL_PLATFORM": "egl", "HYDRA_FULL_ERROR": "1"}
# a fit just long enough to leave a history: the report is under test here, not the fit
FAST_FIT = {"steps": 10, "eval_every": 5, "crop": 32, "batch": 2, "threads": 1}


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


def make_run_dir(base: Path) -> Path:
    """Run the real command on a fresh tiny scene into `base/run` (a short fit, texture 128²,
    working images smaller than the photos)."""
    scene = make_scene(base / "scene")
    run = base / "run"
    # photos reduced to working images (128 x 96 -> 100 x 75): the report must read its held-out
    # images through the working cameras, not the photos'
    r = run_cli(f"scene={scene}", f"out={run}", "quiet=true", "texture.size=128", "photos.max_side=100",
                *(f"fit.{k}={v}" for k, v in FAST_FIT.items()))
    assert r.returncode == 0, r.stderr[-3000:]
    return run
