"""The Hydra configs live at the top of the repository (conf/) and install as the subpackage
featuretex.conf: found by an editable install (this test environment) and by a wheel.

References outside the project: setuptools' own package discovery (find_packages) for the package
list, the wheel's file list (zipfile), and Hydra's own config loader reading pkg://featuretex.conf."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tomllib
import zipfile
from importlib import resources
from pathlib import Path

import pytest
from setuptools import find_packages

ROOT = Path(__file__).resolve().parents[1]
CONF_FILES = ["featuretex.yaml", "hydra/launcher/pool.yaml", "hydra/launcher/slurm.yaml",
              "hydra/launcher/slurm_local.yaml"]
# composes the configuration as the command does, from wherever featuretex is imported
COMPOSE = """
import featuretex, hydra
from hydra import compose, initialize_config_module
from featuretex.config import register
register()
with initialize_config_module(config_module="featuretex.conf", version_base="1.3"):
    cfg = compose("featuretex", ["scene=x", "out=y", "hydra/launcher=pool"], return_hydra_config=True)
print(featuretex.__file__)
print(cfg.hydra.launcher._target_, cfg.hydra.run.dir)
"""


def test_package_list_matches_the_tree():
    listed = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"]
    conf = ["featuretex.conf" + ".".join([""] + list(p.relative_to(ROOT / "conf").parts))
            for p in sorted((ROOT / "conf").rglob("*")) if p.is_dir() and p.name != "__pycache__"]
    assert sorted(listed) == sorted(find_packages(str(ROOT), include=["featuretex", "featuretex.*"])
                                    + ["featuretex.conf"] + conf)


def test_editable_install_reads_the_top_level_conf():
    found = resources.files("featuretex.conf")
    for rel in CONF_FILES:
        assert (found / rel).read_bytes() == (ROOT / "conf" / rel).read_bytes(), rel
    r = subprocess.run([sys.executable, "-c", COMPOSE], cwd="/", capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    assert r.stdout.split()[1:] == ["hydra_plugins.hydra_joblib_launcher.joblib_launcher.JoblibLauncher", "y"]


@pytest.mark.slow
def test_wheel_carries_the_conf_and_runs_from_it(tmp_path):
    src = tmp_path / "src"
    for part in ("featuretex", "conf"):
        shutil.copytree(ROOT / part, src / part, ignore=shutil.ignore_patterns("__pycache__"))
    for part in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / part, src / part)
    r = subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "--no-build-isolation",
                        "-w", str(tmp_path / "dist"), str(src)], capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-2000:]
    wheel = next((tmp_path / "dist").glob("featuretex-*.whl"))
    names = zipfile.ZipFile(wheel).namelist()
    for rel in CONF_FILES:
        assert f"featuretex/conf/{rel}" in names, rel
    assert "featuretex/conf/__init__.py" in names and "featuretex/cli.py" in names
    assert not [n for n in names if n.startswith("conf/")]
    # installed from the wheel alone (unpacked, first on the path): Hydra finds the configs in it
    site = tmp_path / "site"
    zipfile.ZipFile(wheel).extractall(site)
    env = {**os.environ, "PYTHONPATH": str(site)}
    r = subprocess.run([sys.executable, "-c", COMPOSE], cwd=tmp_path, env=env, capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    first, target, run_dir = r.stdout.split()
    assert first == str(site / "featuretex" / "__init__.py")
    assert target == "hydra_plugins.hydra_joblib_launcher.joblib_launcher.JoblibLauncher" and run_dir == "y"
    r = subprocess.run([sys.executable, "-m", "featuretex.cli", "--cfg", "job", "fit.steps=7"], cwd=tmp_path, env=env,
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0 and "steps: 7" in r.stdout, r.stderr[-2000:]
