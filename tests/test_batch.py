"""Batches through the real command: a batch file with per-scan overrides run as a Hydra multirun
through the joblib launcher and submitit's local executor; batch.csv / batch.html checked against
each job's summary.json; a failed scan listed as failed without stopping the others; ordering and
stale job folders on fabricated sweep folders."""

from __future__ import annotations

import csv
import json
import os
import shutil
import time
from html.parser import HTMLParser
from pathlib import Path

import pytest
import yaml

from featuretex import batch
from test_report_fixtures import FAST_FIT, ROOT, make_scene, run_cli

pytestmark = pytest.mark.slow


# ---------------------------------------------------------------------------------------------
# a batch folder: two copies of one tiny scene with different overrides, and a broken scan
# ---------------------------------------------------------------------------------------------
SCANS = {  # scan name -> (scene copy, its own settings)
    "jug_a": ("copy_a", {"texture": {"size": 64}}),
    "jug_b": ("copy_b", {"seed": 3, "texture": {"size": 128}}),
}


@pytest.fixture(scope="module")
def shoot(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("shoot")
    scene = make_scene(root / "original", views=6, width=96, height=72)
    for copy, _ in SCANS.values():
        shutil.copytree(scene.parent, root / copy)
    conf = root / "conf"
    (conf / "scan").mkdir(parents=True)
    example = yaml.safe_load((ROOT / "examples" / "shoot" / "batch.yaml").read_text())
    example["hydra"]["sweeper"]["params"]["scan"] = ",".join(SCANS)
    example["fit"] = dict(FAST_FIT)                 # shared settings of the batch
    (conf / "batch.yaml").write_text(yaml.safe_dump(example, sort_keys=False))
    for name, (copy, settings) in SCANS.items():
        body = {"scene": str(root / copy / "scene.yaml"), **settings}
        (conf / "scan" / f"{name}.yaml").write_text("# @package _global_\n" + yaml.safe_dump(body))
    (conf / "scan" / "broken.yaml").write_text(f"# @package _global_\nscene: {root / 'missing' / 'scene.yaml'}\n")
    return root


def run_batch(shoot: Path, out: Path, *args: str):
    r = run_cli("--config-dir", str(shoot / "conf"), "--config-name", "batch", f"out={out}", *args, timeout=600)
    assert r.returncode == 0, r.stderr[-4000:]
    return r


def read_csv(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))   # Python's csv module is the reference reader


class _Table(HTMLParser):
    """Rows of the batch.html table: the first text of each <tr> in <tbody> (the scan name), and its links."""

    def __init__(self) -> None:
        super().__init__()
        self.rows: list[dict] = []
        self._in_body = False

    def handle_starttag(self, tag, attrs):
        if tag == "tbody":
            self._in_body = True
        elif tag == "tr" and self._in_body:
            self.rows.append({"first": None, "links": []})
        elif tag == "a" and self.rows and self._in_body:
            self.rows[-1]["links"].append(dict(attrs)["href"])

    def handle_endtag(self, tag):
        if tag == "tbody":
            self._in_body = False

    def handle_data(self, data):
        if self._in_body and self.rows and self.rows[-1]["first"] is None and data.strip():
            self.rows[-1]["first"] = data.strip()


def check_index(out: Path, expect_scans: list[str]) -> list[dict[str, str]]:
    """batch.csv rows equal the jobs' summary.json values (numbers exactly); batch.html lists the
    same scans in the same order."""
    rows = read_csv(out / batch.CSV_FILE)
    assert sorted(r["scan"] for r in rows) == sorted(expect_scans)
    for r in rows:
        job = out / r["job"]
        assert (job / "featuretex.log").is_file(), "one log file per job (Hydra job logging)"
        if r["status"] == "failed":
            continue
        s = json.loads((job / "summary.json").read_text())
        assert r["scene"] == s["scene"]
        assert r["verdict"] == (s.get("verdict") or "")
        for m in batch.METHODS:
            want = (s["heldout"].get(m) or {}).get("psnr")
            assert (float(r[f"psnr_{m}"]) if r[f"psnr_{m}"] else None) == want
        for a in batch.AREAS:
            want = (s.get("areas") or {}).get(a)
            assert (float(r[f"area_{a}"]) if r[f"area_{a}"] else None) == want
        for k, v in s["timings_s"].items():
            assert float(r[f"seconds_{k}"]) == v
    table = _Table()
    table.feed((out / batch.HTML_FILE).read_text(encoding="utf-8"))
    assert [t["first"] for t in table.rows] == [r["scan"] for r in rows]
    for t, r in zip(table.rows, rows):
        assert (r["report"] in t["links"]) if r["report"] else True
        assert (out / r["report"]).is_file() if r["report"] else True
    return rows


def check_overrides_applied(out: Path, rows: list[dict[str, str]]) -> None:
    """Each scan's own settings reached its job (the texture size is in summary.json)."""
    for r in rows:
        if r["status"] == "done":
            s = json.loads((out / r["job"] / "summary.json").read_text())
            assert s["texture_size"] == SCANS[r["scan"]][1]["texture"]["size"]
            assert s["seed"] == SCANS[r["scan"]][1].get("seed", 0)


# ---------------------------------------------------------------------------------------------
# through the launchers
# ---------------------------------------------------------------------------------------------
def test_joblib_batch_index_matches_summaries(shoot, tmp_path):
    out = tmp_path / "sweep"
    run_batch(shoot, out, "hydra/launcher=pool", "hydra.launcher.n_jobs=2")
    rows = check_index(out, list(SCANS))
    check_overrides_applied(out, rows)
    assert {r["status"] for r in rows} == {"done"}


def test_submitit_local_batch_index_matches_summaries(shoot, tmp_path):
    out = tmp_path / "sweep"
    run_batch(shoot, out, "hydra/launcher=slurm_local")
    assert (out / ".submitit").is_dir()          # the jobs really went through submitit
    rows = check_index(out, list(SCANS))
    check_overrides_applied(out, rows)


def test_failed_scan_does_not_stop_the_batch(shoot, tmp_path):
    out = tmp_path / "sweep"
    # one job at a time, the broken scan first: the next one must still run
    run_batch(shoot, out, "hydra/launcher=pool", "hydra.launcher.n_jobs=1", "scan=broken,jug_a")
    rows = check_index(out, ["broken", "jug_a"])
    failed = [r for r in rows if r["status"] == "failed"]
    assert [r["scan"] for r in failed] == ["broken"]
    info = json.loads((out / failed[0]["job"] / batch.FAILED_FILE).read_text())
    assert info["type"] == "InputError" and "missing" in info["error"] and failed[0]["error"] == info["error"]
    assert "traceback" not in info                  # bad input: the message, not a traceback
    done = [r for r in rows if r["status"] == "done"]
    assert len(done) == 1 and (out / done[0]["job"] / "summary.json").is_file()


def test_pool_preset_runs_one_job_per_core():
    r = run_cli("hydra/launcher=pool", "scene=demo", "--cfg", "hydra")
    assert r.returncode == 0, r.stderr[-2000:]
    launcher = yaml.safe_load(r.stdout)["hydra"]["launcher"]
    assert launcher["_target_"].endswith("JoblibLauncher")
    assert launcher["n_jobs"] == -1   # joblib.Parallel documentation: n_jobs=-1 uses all CPUs


def test_example_batch_file_composes_each_scan():
    example = ROOT / "examples" / "shoot"
    names = yaml.safe_load((example / "batch.yaml").read_text())["hydra"]["sweeper"]["params"]["scan"].split(",")
    assert sorted(names) == sorted(p.stem for p in (example / "scan").glob("*.yaml"))
    for name in names:
        r = run_cli("--config-dir", str(example), "--config-name", "batch", f"scan={name}", "hydra.mode=RUN",
                    "--cfg", "job")
        assert r.returncode == 0, r.stderr[-2000:]
        cfg = yaml.safe_load(r.stdout)
        own = yaml.safe_load((example / "scan" / f"{name}.yaml").read_text())
        assert cfg["scene"] == own["scene"]
        assert cfg["texture"]["size"] == own["texture"]["size"]
        assert cfg["seed"] == own.get("seed", 0)


# ---------------------------------------------------------------------------------------------
# ordering and stale folders, on fabricated job folders (invented test data)
# ---------------------------------------------------------------------------------------------
def _job(sweep: Path, name: str, *, verdict: str | None = None, psnr: float = 20.0, failed: str | None = None,
         finished: bool = True) -> Path:
    job = sweep / name
    (job / ".hydra").mkdir(parents=True)
    (job / ".hydra" / "overrides.yaml").write_text(yaml.safe_dump([f"scan={name}"]))
    if failed is not None:
        (job / batch.FAILED_FILE).write_text(json.dumps({"error": failed}))
    elif finished:
        s = {"scene": f"/scans/{name}/scene.yaml", "heldout": {"neural": {"psnr": psnr}},
             "timings_s": {"total": 1.0}, "areas": {"uncovered": 0.01}}
        if verdict:
            s["verdict"] = verdict
        (job / "summary.json").write_text(json.dumps(s))
    return job


def test_rescans_first_then_by_how_much_work(tmp_path):
    sweep = tmp_path / "sweep"
    _job(sweep, "0", verdict="ready", psnr=30)
    _job(sweep, "1", verdict="refine-texture", psnr=25)
    _job(sweep, "2", verdict="rescan", psnr=28)
    _job(sweep, "3", failed="scene.yaml: scene file not found")
    _job(sweep, "4", verdict="fix-geometry", psnr=22)
    _job(sweep, "5", verdict="rescan", psnr=21)
    _job(sweep, "6", finished=False)                       # killed before summary.json
    _job(sweep, "7", verdict=None)
    assert batch.main([str(sweep)]) == 0
    rows = read_csv(sweep / batch.CSV_FILE)
    assert [r["scan"] for r in rows] == ["5", "2", "3", "6", "4", "1", "7", "0"]
    assert [r["status"] for r in rows].count("failed") == 2
    assert "summary.json" in rows[3]["error"]


def test_job_folders_of_an_earlier_batch_are_left_out(tmp_path):
    sweep = tmp_path / "sweep"
    old = _job(sweep, "old", verdict="ready")
    past = time.time() - 3600
    os.utime(old / ".hydra" / "overrides.yaml", (past, past))
    _job(sweep, "new", verdict="rescan")
    _job(sweep, ".submitit/123", verdict="rescan")          # submitit's own folder is no job
    rows = batch.sort_rows([batch.read_job(j, sweep) for j in batch.find_job_dirs(sweep, since=time.time() - 60)])
    assert [r.scan for r in rows] == ["new"]
