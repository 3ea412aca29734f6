"""Before Hydra acts: compose the run's configuration exactly as Hydra will, and check all of it.

Hydra creates the run folder, writes `.hydra/` into it and instantiates callbacks, launchers and
sweepers before any featuretex code runs in the job, and it reports its own composition errors as
several lines (or a traceback) with exit status 1. So the command line composes every job's
configuration first, with Hydra's own loader and the same overrides (a batch: one per job of the
sweep, as Hydra's sweeper splits it), and checks in one place:

* composition itself (unknown keys, values of the wrong type, unknown config group options):
  one line naming the key, the value and what is allowed;
* objects Hydra would build, the run folder keys and the log files (featuretex/safety.py);
* every setting against the settings dataclasses (featuretex/settings.py), and the launcher's;
* that `out` is neither the scene folder, nor inside it, nor holding it.

Without `out=` the run goes to a new folder `runs/<date>_<time>` (a batch: `multirun/<date>_<time>`),
given to Hydra as `out=`, so the run folder is always `out`.
"""

from __future__ import annotations

import copy
import importlib.util
import re
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from omegaconf import DictConfig, OmegaConf, open_dict

from featuretex.arguments import Arguments, hydra_quote
from featuretex.config import FeaturetexConfig, LauncherSettings
from featuretex.errors import InputError
from featuretex.settings import (check_settings, check_value, describe_type, field_spec, one_of, refuse, shown,
                                 unknown_setting)

CONFIG_MODULE = "pkg://featuretex.conf"
CONFIG_NAME = "featuretex"
CLI_FILE = Path(__file__).resolve().parent / "cli.py"   # where Hydra's relative --config-path starts


@dataclass
class Plan:
    argv: list[str]                   # the command line for Hydra
    folder: Path                      # the run folder (a batch: its sweep folder)
    multirun: bool
    jobs: list[FeaturetexConfig]      # the settings of every job


def _hydra(argv: list[str]) -> tuple[Any, Any]:
    """(Hydra instance with featuretex's config search path, parsed arguments)."""
    import os

    from hydra._internal.hydra import Hydra
    from hydra._internal.utils import create_automatic_config_search_path, get_args_parser
    from hydra.core.config_search_path import SearchPathQuery

    args = get_args_parser().parse_args(argv)
    search = create_automatic_config_search_path(str(CLI_FILE), None, args.config_path or CONFIG_MODULE)
    if args.config_dir is not None:
        folder = os.path.abspath(args.config_dir)
        if not os.path.isdir(folder):
            raise InputError(f"command line: --config-dir '{folder}' is not a folder")
        search.prepend(provider="command-line", path=f"file://{folder}", anchor=SearchPathQuery(provider="schema"))
    return Hydra.create_main_hydra2(task_name="featuretex", config_search_path=search), args


def prepare(arguments: Arguments) -> Plan:
    """Compose and check every job of the command (see the module doc). Raises InputError."""
    from hydra.core.global_hydra import GlobalHydra
    from hydra.types import RunMode

    from featuretex.config import register
    from featuretex.safety import check_composed

    register()
    if importlib.util.find_spec("featuretex.conf") is None:
        raise InputError("the configuration package featuretex.conf is not installed (the configs live in conf/ "
                         "at the top of the repository: run make install, or pip install -e . again)")
    try:
        hydra, args = _hydra(arguments.argv)
        name = args.config_name or CONFIG_NAME
        overrides = list(arguments.overrides)
        mode = _compose(lambda: hydra.get_mode(config_name=name, overrides=overrides))
        multirun = arguments.multirun or mode == RunMode.MULTIRUN
        run_mode = RunMode.MULTIRUN if multirun else RunMode.RUN
        cfg = _compose(lambda: hydra.compose_config(name, overrides, run_mode=run_mode,
                                                    with_log_configuration=False))
        if OmegaConf.select(cfg, "out") is None:
            stamp = time.strftime("%Y-%m-%d_%H-%M-%S")
            default = f"{'multirun' if multirun else 'runs'}/{stamp}"
            overrides.append(f"out={hydra_quote(default)}")
            cfg = _compose(lambda: hydra.compose_config(name, overrides, run_mode=run_mode,
                                                        with_log_configuration=False))
        check_composed(cfg)
        _check_launcher(cfg)
        configs = _job_configs(hydra, cfg) if multirun else [cfg]
        jobs = [_settings(c) for c in configs]
    finally:
        GlobalHydra.instance().clear()
    folder = Path(str(jobs[0].out)).expanduser()
    for job in jobs:
        check_out_and_scene(folder, job.scene)
    options = arguments.argv[: len(arguments.argv) - len(arguments.overrides)]
    return Plan(argv=options + overrides, folder=folder, multirun=multirun, jobs=jobs)


def _job_configs(hydra: Any, cfg: DictConfig) -> list[DictConfig]:
    """Every job's configuration, split as Hydra's basic sweeper splits the sweep."""
    from hydra._internal.core_plugins.basic_sweeper import BasicSweeper
    from hydra.core.override_parser.overrides_parser import OverridesParser

    params = [f"{k}={v}" for k, v in (OmegaConf.select(cfg, "hydra.sweeper.params") or {}).items()]
    task = OmegaConf.to_container(cfg.hydra.overrides.task, resolve=False)
    parsed = _compose(lambda: OverridesParser.create(config_loader=hydra.config_loader).parse_overrides(params + task))
    batches = BasicSweeper.split_arguments(parsed, None)
    return [_compose(lambda: hydra.config_loader.load_sweep_config(cfg, list(job)))
            for batch in batches for job in batch]


def _settings(cfg: DictConfig) -> FeaturetexConfig:
    """The job's settings as the job will see them, checked."""
    job = copy.copy(cfg)
    with open_dict(job):
        job.pop("hydra", None)
    _no_extra_keys(job, FeaturetexConfig)
    conf = _compose(lambda: OmegaConf.to_object(job))
    check_settings(conf)
    return conf  # type: ignore[return-value]


def _no_extra_keys(node: DictConfig, schema: type, prefix: str = "") -> None:
    """Refuse keys the settings dataclasses do not have (`+fit.step=100` would add one)."""
    import dataclasses

    fields = {f.name: f for f in dataclasses.fields(schema)}
    for key in node.keys():
        sub = f"{prefix}{key}"
        if key not in fields:
            raise unknown_setting(FeaturetexConfig, sub)
        inner = field_spec(schema, str(key))
        if inner and dataclasses.is_dataclass(inner[0]) and isinstance(node[key], DictConfig):
            _no_extra_keys(node[key], inner[0], sub + ".")


def _check_launcher(cfg: DictConfig) -> None:
    launcher = OmegaConf.select(cfg, "hydra.launcher") or {}
    for key in launcher:
        spec = field_spec(LauncherSettings, str(key))
        if spec is not None and launcher[key] is not None:   # null: the plugin's own default
            check_value(f"hydra.launcher.{key}", launcher[key], *spec)


def check_out_and_scene(out: Path, scene: str) -> None:
    """Refuse an `out` that is the scene folder, lies inside it or holds it: the run writes into
    `out` (and removes what an interrupted run left there), and inputs are never written to."""
    from featuretex.scene.locate import scene_folder

    folder = scene_folder(scene)
    if folder is None:
        return
    o, s = out.expanduser().resolve(), folder.resolve()
    if o == s or s in o.parents or o in s.parents:
        how = "is the scene folder" if o == s else "lies inside the scene folder" if s in o.parents \
            else "holds the scene folder"
        raise InputError(f"command line: out '{out}' {how} '{folder}'; refused (the run writes into out; "
                         "choose a folder outside the scene)")


# ---------------------------------------------------------------------------------------------
# Hydra's composition errors as one line
# ---------------------------------------------------------------------------------------------
def _compose(step: Any) -> Any:
    try:
        return step()
    except InputError:
        raise
    except Exception as e:  # noqa: BLE001 (Hydra and OmegaConf raise many types; each becomes one line)
        raise composition_error(e) from None


def composition_error(e: BaseException) -> InputError:
    """One line for an error Hydra or OmegaConf raised while composing the configuration."""
    from hydra.errors import MissingConfigException
    from omegaconf.errors import ConfigAttributeError, ConfigKeyError, MissingMandatoryValue, ValidationError

    chain = []
    c: BaseException | None = e
    while c is not None and len(chain) < 10:
        chain.append(c)
        c = c.__cause__ or c.__context__
    for c in chain:
        full_key = str(getattr(c, "full_key", "") or "")
        if isinstance(c, MissingConfigException) and c.options is not None and c.missing_cfg_file:
            group, _, option = str(c.missing_cfg_file).rpartition("/")
            return refuse(group, option, one_of(sorted(c.options)) if c.options else "no option installed")
        if isinstance(c, MissingMandatoryValue) and full_key:
            if full_key == "scene":
                return InputError("missing setting 'scene' (give the scene: featuretex PATH, or scene=PATH)")
            return InputError(f"missing setting '{full_key}'")
        if isinstance(c, (ConfigKeyError, ConfigAttributeError)) and full_key:
            return unknown_setting(FeaturetexConfig, full_key) if not full_key.startswith("hydra.") \
                else InputError(f"unknown setting '{full_key}'")
        if isinstance(c, ValidationError) and full_key:
            m = re.search(r"[Vv]alue '(.*?)' (?:of type|could not)", str(c))
            value = m.group(1) if m else "?"
            spec = field_spec(FeaturetexConfig, full_key)
            allowed = describe_type(spec[0]) if spec else str(c).splitlines()[0]
            return InputError(f"setting '{full_key}' = {shown(value)}: allowed {allowed}")
    said = [" ".join(str(c).split()) for c in chain]
    first = next((t for t in said if t and t != "None"), type(e).__name__)
    return InputError(f"command line: {shown(first, 200)}")
