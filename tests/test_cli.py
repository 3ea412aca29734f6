"""The command as people type it: scene folders with everyday names, the run folder without out=,
help text, the bundled demo's name, and quoting for Hydra checked against Hydra's own parser.

Reference outside the project: Hydra's override parser and OmegaConf's resolution (what Hydra
really makes of an override), used to read back every quoted path.
"""

from __future__ import annotations

import json
import logging
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from featuretex.arguments import hydra_quote, parse
from featuretex.errors import InputError
from test_bad_inputs import QUICK, _digest, good_scene  # noqa: F401 (fixture)

ROOT = Path(__file__).resolve().parents[1]
NAMES = ["Müller", "my scans ü 漢字", "jug,v2", "jug${x}"]


def _cli(args: list[str], cwd: Path, timeout: int = 600) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYOPENGL_PLATFORM": "egl"}
    env.pop("HYDRA_FULL_ERROR", None)
    return subprocess.run([sys.executable, "-m", "featuretex.cli", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=timeout)


@pytest.fixture(scope="module")
def named_scenes(good_scene, tmp_path_factory) -> Path:
    """A folder holding a copy of the small good scene under each everyday name, and `cwd/`."""
    base = tmp_path_factory.mktemp("names")
    for n in NAMES:
        shutil.copytree(good_scene, base / n)
    (base / "cwd").mkdir()
    return base


@pytest.mark.slow
def test_everyday_folder_names_run_as_one_scene_and_as_a_batch(named_scenes):
    base = named_scenes
    before = {n: _digest(base / n) for n in NAMES}
    cwd = base / "cwd"
    # a single run: the scene as the first argument, relative to the working folder, no out=
    single = _cli([f"../{NAMES[2]}", *QUICK], cwd)
    assert single.returncode == 0, single.stderr[-2000:]
    runs = list((cwd / "runs").iterdir())
    assert len(runs) == 1 and (runs[0] / "summary.json").is_file()     # runs/<date>_<time>/
    assert os.listdir(cwd) == ["runs"]
    assert "loss nan" not in single.stderr                            # progress shows numbers or nothing
    # a batch of the others, one path each, into an out= with the same kind of name
    out = base / "out ü, 1"
    batch = _cli(["-m", *(str(base / n) for n in NAMES if n != NAMES[2]), f"out={out}", *QUICK], cwd)
    assert batch.returncode == 0, batch.stderr[-2000:]
    scenes = {json.loads((out / j / "summary.json").read_text())["scene"] for j in ("0", "1", "2")}
    assert scenes == {str((base / n / "scene.yaml").resolve()) for n in NAMES if n != NAMES[2]}
    assert (out / "batch.csv").is_file()
    # inputs untouched, and nothing written beside them
    assert {n: _digest(base / n) for n in NAMES} == before
    assert sorted(os.listdir(base)) == sorted(NAMES + ["cwd", "out ü, 1"])


def test_help_starts_with_featuretex_own_words(tmp_path):
    p = _cli(["--help"], tmp_path)
    assert p.returncode == 0
    head = p.stdout.splitlines()[:12]
    assert head[0].startswith("featuretex learns a sharp texture"), head
    text = "\n".join(head)
    assert "featuretex demo out=runs/demo" in text and "featuretex path/to/scan out=runs/scan" in text
    assert "README.md" in text and "--cfg job" in text
    cfg = _cli(["--cfg", "job", "fit.steps=7"], tmp_path)
    assert cfg.returncode == 0 and "steps: 7" in cfg.stdout
    assert os.listdir(tmp_path) == []


def test_demo_means_the_bundled_scene_and_says_so(tmp_path, monkeypatch, caplog):
    from featuretex.scene.locate import resolve_scene_path

    (tmp_path / "demo").mkdir()
    monkeypatch.chdir(tmp_path)
    with caplog.at_level(logging.WARNING, logger="featuretex"):
        path = resolve_scene_path("demo")
    assert path == ROOT / "demo_assets" / "scene" / "scene.yaml"
    assert "not the folder 'demo'" in caplog.text and "scene=./demo" in caplog.text
    assert resolve_scene_path("./demo") == Path("./demo")


@settings(max_examples=300, deadline=None)
@given(st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\0"), min_size=1, max_size=40))
def test_any_path_reads_back_through_hydra(text):
    """Every text is passed on exactly, but one with a backslash right before `${` (OmegaConf's own
    escape sequence), which is refused with a line rather than changed."""
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from omegaconf import OmegaConf

    if "\\${" in text:
        with pytest.raises(InputError, match="cannot be passed on"):
            hydra_quote(text)
        return
    value = OverridesParser.create().parse_overrides([f"scene={hydra_quote(text)}"])[0].value()
    assert OmegaConf.create({"k": value}).k == text


@pytest.mark.parametrize("name", NAMES + ["it's", "a=b", "x\\'y", "ends\\"])
def test_everyday_names_are_quoted_losslessly(name):
    hydra_quote(name)   # raises InputError when the round trip through Hydra would change it


def test_plain_arguments_become_the_scene():
    a = parse(["Müller/scan", "out=runs/x y", "fit.steps=3"])
    assert a.overrides == ["scene='Müller/scan'", "out='runs/x y'", "fit.steps=3"] and a.runs_job
    b = parse(["-m", "a", "b c", "--config-dir", "conf"])
    assert b.argv == ["-m", "--config-dir", "conf", "scene='a','b c'"] and b.multirun
    assert parse(["--cfg", "job", "x"]).runs_job is False
    with pytest.raises(InputError, match="add -m"):
        parse(["a", "b"])
    with pytest.raises(InputError, match="given twice"):
        parse(["a", "scene=b"])
    with pytest.raises(InputError, match=r"\$\{"):
        parse(["a", "out=runs/${now}"])
