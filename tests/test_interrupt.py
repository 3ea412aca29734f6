"""A run killed with SIGKILL mid-fit or mid-export, then started again with the same command,
resumes and finishes with the figures of a run that was never interrupted; no half-written output is
ever visible.

References outside the project: POSIX SIGKILL semantics (the process gets no chance to clean up, so
only what is already on disk counts) and rename(2) atomicity within one file system, which is what
featuretex.atomic relies on. The tolerance is exact equality: the fit is seeded and resumes its RNG
and optimiser state from the checkpoint, so there is nothing legitimate to differ.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch

from tests.scenes import smooth_texture, sphere_scene

ROOT = Path(__file__).resolve().parents[1]
ENV = {**os.environ, "PYOPENGL_PLATFORM": "egl"}
# long enough that a kill after the first checkpoint lands mid-fit; report off (not under test here)
ARGS = ["quiet=true", "report=false", "texture.size=64", "fit.steps=60", "fit.checkpoint_every=10",
        "fit.eval_every=30", "fit.crop=32", "fit.batch=2", "fit.threads=1", "fit.rebake_at=0"]
# outputs compared byte for byte with the uninterrupted run
OUTPUTS = ["baseline_texture.png", "texture.png", "model.glb", "model.obj", "model.mtl", "error_map.png"]

# Runs the real command with featuretex.atomic patched so that writing `target` is cut short:
# the temporary file gets half its bytes, then the process SIGKILLs itself before the rename.
KILLER = """
import os, signal, sys
from contextlib import contextmanager
from pathlib import Path
import featuretex.atomic as atomic
victim, real = sys.argv[1], atomic.atomic_path
@contextmanager
def dying(target, suffix=None):
    with real(target, suffix) as tmp:
        yield tmp
        if Path(target).name == victim:
            data = tmp.read_bytes()
            tmp.write_bytes(data[: len(data) // 2])
            os.kill(os.getpid(), signal.SIGKILL)
atomic.atomic_path = dying
from featuretex.cli import main
sys.argv = ["featuretex", *sys.argv[2:]]
main()
"""


def _cmd(scene: Path, out: Path) -> list[str]:
    return [sys.executable, "-m", "featuretex.cli", f"scene={scene}", f"out={out}", *ARGS]


def _run(scene: Path, out: Path, with_log: bool = False):
    r = subprocess.run(_cmd(scene, out), cwd=ROOT, env=ENV, capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-3000:]
    summary = json.loads((out / "summary.json").read_text())
    return (summary, r.stdout + r.stderr) if with_log else summary   # log lines go to stdout


def _figures(summary: dict) -> dict:
    return {"heldout": summary["heldout"], "verdict": summary["verdict"], "areas": summary["areas"]}


def _visible(out: Path) -> list[Path]:
    return [p for p in out.rglob("*") if p.is_file() and not any(part.startswith(".") for part in p.relative_to(out).parts)]


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    base = tmp_path_factory.mktemp("interrupt")
    scene, _ = sphere_scene(base / "scene", texture=smooth_texture(128, seed=5), n_views=8, size=(96, 72))
    out = base / "whole"
    return scene, out, _run(scene, out)


def test_sigkill_mid_fit_then_rerun_matches_uninterrupted_run(reference, tmp_path):
    scene, whole, summary = reference
    out = tmp_path / "cut"
    ckpt, done = out / "fit" / "checkpoint.pt", out / "fit" / "model.pt"
    proc = subprocess.Popen(_cmd(scene, out), cwd=ROOT, env=ENV, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 600
    while not ckpt.exists() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)
    proc.send_signal(signal.SIGSTOP)   # holds its lock while stopped
    # a second run into the same folder stops at once, naming the first
    second = subprocess.run(_cmd(scene, out), cwd=ROOT, env=ENV, capture_output=True, text=True, timeout=600)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert second.returncode == 2, second.stderr[-3000:]
    lines = second.stderr.strip().splitlines()
    assert len(lines) == 1 and f"PID {proc.pid} on host {socket.gethostname()}" in lines[0], second.stderr
    assert proc.returncode == -signal.SIGKILL, "the run ended before it could be killed mid-fit"
    assert ckpt.exists() and not done.exists(), "the kill did not land mid-fit"
    # what the kill left is whole: the checkpoint loads with tensor-only deserialisation
    state = torch.load(ckpt, weights_only=True)
    assert 0 < int(state["loop"]["step"]) < 60
    assert not (out / "summary.json").exists()
    assert (out / ".featuretex.lock").exists()          # the killed run could not remove its lock

    resumed, log = _run(scene, out, with_log=True)
    assert f"took over the lock of a run that ended without releasing it (PID {proc.pid}" in log
    assert not (out / ".featuretex.lock").exists()
    assert _figures(resumed) == _figures(summary)
    for name in OUTPUTS:
        assert (out / name).read_bytes() == (whole / name).read_bytes(), name


@pytest.mark.parametrize("victim", ["model.glb", "model.obj"])
def test_sigkill_mid_export_leaves_no_half_file_and_rerun_matches(reference, tmp_path, victim):
    scene, whole, summary = reference
    out = tmp_path / "cut"
    r = subprocess.run([sys.executable, "-c", KILLER, victim, *_cmd(scene, out)[3:]], cwd=ROOT, env=ENV,
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == -signal.SIGKILL, r.stderr[-3000:]
    # the half-written file never became visible under its name; only the hidden temporary exists
    assert not (out / victim).exists()
    partials = [p for p in out.glob(f".{victim}.partial-*")]
    assert len(partials) == 1 and 0 < partials[0].stat().st_size < (whole / victim).stat().st_size
    # every file that is visible is complete: byte-identical to the uninterrupted run's
    for p in _visible(out):
        rel = p.relative_to(out)
        if rel.name in OUTPUTS:
            assert p.read_bytes() == (whole / rel).read_bytes(), rel
    assert (out / "texture.png").exists()  # the kill came after the bake, inside the export

    resumed = _run(scene, out)
    assert _figures(resumed) == _figures(summary)
    assert resumed["fit"] == summary["fit"] == {"steps": 60, "stopped": "steps"}   # the fit's own ending
    for name in OUTPUTS:
        assert (out / name).read_bytes() == (whole / name).read_bytes(), name
    assert not list(out.rglob("*.partial-*")), "the re-run removes what the killed writer left"


# ---------------------------------------------------------------------------------------------
# Damaged state in the run folder is thrown away (one line each) and computed again
# ---------------------------------------------------------------------------------------------
def _garbage(p: Path) -> None:
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_bytes(b"\x00\x13 not what it should be " * 40)


def _truncate(p: Path) -> None:
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])


def _wrong_torch_file(p: Path) -> None:
    torch.save([torch.zeros(3), "a list, not a checkpoint"], p)   # loads fine with weights_only


DAMAGES = {
    # name: (what to do to a copy of the finished run folder, files the log must name)
    "checkpoint_garbage_and_truncated_caches": (
        lambda out: (_garbage(out / "fit" / "checkpoint.pt"), (out / "fit" / "model.pt").unlink(),
                     _truncate(sorted((out / "cache" / "gbuffer").glob("*.npy"))[0]),
                     _truncate(out / "stages" / "baseline.npz")),
        lambda out: ["fit/checkpoint.pt", sorted((out / "cache" / "gbuffer").glob("*.npy"))[0].name,
                     "stages/baseline.npz"]),
    "checkpoint_of_the_wrong_type": (
        lambda out: (_wrong_torch_file(out / "fit" / "checkpoint.pt"), (out / "fit" / "model.pt").unlink()),
        lambda out: ["fit/checkpoint.pt"]),
    "model_and_stage_record_garbage": (
        lambda out: (_garbage(out / "fit" / "model.pt"), _garbage(out / "stages.json")),
        lambda out: ["fit/model.pt", "stages.json"]),
}


@pytest.mark.parametrize("damage", sorted(DAMAGES))
def test_damaged_run_folder_is_recomputed_and_matches(reference, tmp_path, damage):
    import shutil

    scene, whole, summary = reference
    out = tmp_path / "run"
    shutil.copytree(whole, out)
    break_it, named = DAMAGES[damage]
    names = named(out)
    break_it(out)
    resumed, log = _run(scene, out, with_log=True)
    warned = [ln for ln in log.splitlines() if "does not read back" in ln]
    for name in names:
        assert sum(name in ln for ln in warned) == 1, (name, warned)
    assert _figures(resumed) == _figures(summary)
    assert resumed["fit"] == summary["fit"]
    for name in OUTPUTS:
        assert (out / name).read_bytes() == (whole / name).read_bytes(), name


# Fills the disk the run writes to just before the fit's second checkpoint is written.
FILLER = """
import os, sys
from pathlib import Path
import featuretex.fit.checkpoint as ck
filler, real, calls = Path(sys.argv[1]), ck.save, []
def save(path, payload):
    calls.append(path)
    if Path(path).name == "checkpoint.pt" and len(calls) == 2:
        fd = os.open(filler, os.O_WRONLY | os.O_CREAT)
        try:
            while True:
                os.write(fd, b"\\0" * (1 << 16))
        except OSError:
            os.close(fd)
    return real(path, payload)
ck.save = save
from featuretex.cli import main
sys.argv = ["featuretex", *sys.argv[2:]]
main()
"""


def test_disk_full_while_checkpointing_stops_with_one_line_and_resumes(reference, tmp_path):
    from test_bad_inputs import tmpfs

    scene, whole, summary = reference
    with tmpfs(tmp_path / "disk", "size=48m") as disk:
        out = disk / "run"
        r = subprocess.run([sys.executable, "-c", FILLER, str(disk / "filler"), *_cmd(scene, out)[3:]], cwd=ROOT,
                           env=ENV, capture_output=True, text=True, timeout=600)
        assert r.returncode == 3, r.stderr[-3000:]
        lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
        assert len(lines) == 1 and "checkpoint.pt" in lines[0] and "No space left" in lines[0], r.stderr
        state = torch.load(out / "fit" / "checkpoint.pt", weights_only=True)   # the first one, whole
        assert int(state["loop"]["step"]) == 10
        assert not list(out.rglob("*.partial-*"))
        (disk / "filler").unlink()                     # space freed: the same command resumes
        resumed, log = _run(scene, out, with_log=True)
        assert "resuming from" in log and "at step 10" in log
        assert _figures(resumed) == _figures(summary)
        for name in OUTPUTS:
            assert (out / name).read_bytes() == (whole / name).read_bytes(), name
