"""Refuse configuration that could run code a user did not choose to install.

Hydra builds objects from `_target_` keys (and calls them with `_args_`, `_partial_`, ...) for
its own callbacks, launchers and sweepers; featuretex itself never instantiates anything from
config (plugins are chosen by registered name, featuretex/plugins.py). So a YAML file or a
command-line override from a colleague must never carry such keys, except where Hydra needs them
and they name code that ships with featuretex or with an installed Hydra plugin.

`check_argv(argv)` is called by the CLI before Hydra sees the command line. It checks

* every override (`key=value`, `+key=value`, `++key=value`, sweeps), keys and values;
* every YAML file in a config folder Hydra would read: `--config-dir/-cd`, `--config-path/-cp`,
  and `hydra.searchpath` entries (the files `+group=option` and `--config-name` pick come from
  these folders);

and refuses, with an InputError naming the file (or "command line") and the key:

* `_target_`, `_call_`, `_args_`, `_partial_`, `_recursive_`, `_convert_` anywhere outside `hydra.`;
* under `hydra.` (callbacks, launcher, sweeper): a `_target_` that is not one of ALLOWED_TARGETS
  (featuretex's batch index, the launchers its configs name, Hydra's own basic launcher and
  sweeper), `_call_`, and the other keys beside a refused `_target_`;
* any text value that spells one of those keys or builds a mapping from text (`oc.create`,
  `oc.decode` interpolations), which could smuggle one in;
* `hydra.job.env_set` of variables that change what code a process loads (`LD_*`, `DYLD_*`,
  `PYTHON*`), and `hydra.launcher.setup` (shell lines a cluster launcher runs before the job);
* `pkg://` search paths outside `featuretex` / `hydra_plugins`, and `--experimental-rerun`
  (it loads a pickle, which can run anything).

`check_composed(cfg)` checks the configuration as Hydra composed it from all of that (so also what
a batch file's defaults pull in), before Hydra instantiates anything: the same rule for every
`_target_`; the run folder keys (`hydra.run.dir`, `hydra.sweep.dir`, `hydra.sweep.subdir`,
`hydra.output_subdir`, `hydra.job.name`, `hydra.job.chdir`) keep featuretex's values, so the run
folder is `out` and nothing else; log handlers are the standard library's and write inside the
job's folder; a cluster launcher's job files stay in the sweep folder.

`check_output_dir(folder)` (also before Hydra, which creates the run folder and writes `.hydra/`
before any featuretex code runs, and reports a failure there as a traceback) makes sure the
output folder can be created and written, raising the OSError of the first thing that fails.
"""

from __future__ import annotations

import os
import re
import tempfile
from importlib import resources
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import yaml

from featuretex.errors import InputError, input_error
from featuretex.settings import shown

INSTANTIATE_KEYS = ("_target_", "_call_", "_args_", "_partial_", "_recursive_", "_convert_")
ALLOWED_TARGETS = frozenset({
    "featuretex.batch.BatchIndex",
    "hydra._internal.core_plugins.basic_launcher.BasicLauncher",
    "hydra._internal.core_plugins.basic_sweeper.BasicSweeper",
    "hydra_plugins.hydra_joblib_launcher.joblib_launcher.JoblibLauncher",
    "hydra_plugins.hydra_submitit_launcher.submitit_launcher.LocalLauncher",
    "hydra_plugins.hydra_submitit_launcher.submitit_launcher.SlurmLauncher",
})
TRUSTED_PACKAGES = ("featuretex", "hydra_plugins")   # config packages (pkg://) that may be searched
# the run folder keys and their only values: the run folder is `out`
RUN_FOLDER_KEYS = {"hydra.run.dir": "${out}", "hydra.sweep.dir": "${out}", "hydra.sweep.subdir": "${hydra.job.num}",
                   "hydra.output_subdir": ".hydra", "hydra.job.name": "featuretex"}
LOG_HANDLER_CLASSES = frozenset({"logging.StreamHandler", "logging.FileHandler", "logging.NullHandler"})
_BUILDS_MAPPING = re.compile(r"\$\{\s*oc\.(create|decode)\s*:")
_KEY_IN_TEXT = re.compile(r"(%s)['\"]?\s*:" % "|".join(INSTANTIATE_KEYS))
_LOADER_ENV = re.compile(r"^(LD_|DYLD_|PYTHON)")
MAX_CONFIG_FILES = 2000          # a config folder is a few dozen files; more means a wrong folder
MAX_CONFIG_BYTES = 4 << 20       # per YAML file
CLI_FILE = "command line"
PACKAGE_DIR = Path(__file__).resolve().parent  # --config-path is relative to featuretex/cli.py


def check_argv(argv: list[str]) -> None:
    """Raise InputError if the command line (without the program name) could run untrusted code."""
    from hydra._internal.utils import get_args_parser

    try:
        args, _ = get_args_parser().parse_known_args(argv)
    except SystemExit:  # malformed options: Hydra will print its own usage message
        return
    if args.experimental_rerun is not None:
        raise input_error(CLI_FILE, "--experimental-rerun loads a pickled config, which can run any code; refused",
                          field="--experimental-rerun", hint="re-run with the same overrides instead")
    if args.config_name and _escapes(args.config_name):
        raise input_error(CLI_FILE, f"config name {args.config_name!r} points outside the config folders; refused",
                          field="--config-name", hint="give the name of a YAML file inside --config-dir")
    dirs: list[tuple[Path, str]] = []
    if args.config_dir:
        dirs.append((Path(args.config_dir).expanduser(), "--config-dir"))
    if args.config_path:
        dirs += _config_path_dirs(args.config_path)
    overrides = list(_overrides(args.overrides or []))
    for key, value, _ in overrides:
        check_value(key, value, CLI_FILE)
        if key == "hydra.searchpath":
            dirs += _searchpath_dirs(value)
    roots = [Path(str(resources.files("featuretex.conf")))] + [d for d, _ in dirs]
    for key, value, group in overrides:
        is_group = "/" in group or any((r / group).is_dir() for r in roots)
        if is_group and isinstance(value, str) and _escapes(value):
            raise input_error(CLI_FILE, f"config option {value!r} points outside the config folders; refused",
                              field=group, hint="name a YAML file inside the group's folder")
    for d, how in dirs:
        check_config_dir(d, how)


def _escapes(name: str) -> bool:
    """A config name / group option that leaves its folder (Hydra joins it to the folder as given)."""
    p = Path(name)
    return p.is_absolute() or ".." in p.parts


def _overrides(overrides: list[str]) -> Iterator[tuple[str, Any, str]]:
    """(dotted key, value, key as written) per override; a sweep yields one triple per choice."""
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from hydra.errors import HydraException

    try:
        parsed = OverridesParser.create().parse_overrides(overrides)
    except HydraException:  # Hydra reports the syntax error itself, and runs nothing
        return
    for ov in parsed:
        key = ov.key_or_group.replace("/", ".")
        value = ov.value()
        choices = getattr(value, "list", None)
        for v in choices if isinstance(choices, list) else [value]:
            yield key, v, ov.key_or_group


def _config_path_dirs(value: str) -> list[tuple[Path, str]]:
    if value.startswith("pkg://"):
        _check_package(value[len("pkg://"):], CLI_FILE, "--config-path")
        return []
    p = Path(value.removeprefix("file://")).expanduser()
    return [(p if p.is_absolute() else PACKAGE_DIR / p, "--config-path")]


def _searchpath_dirs(value: Any) -> list[tuple[Path, str]]:
    out = []
    for entry in value if isinstance(value, list) else [value]:
        if not isinstance(entry, str):
            continue
        if entry.startswith("pkg://"):
            _check_package(entry[len("pkg://"):], CLI_FILE, "hydra.searchpath")
        else:
            out.append((Path(entry.removeprefix("file://")).expanduser(), "hydra.searchpath"))
    return out


def _check_package(name: str, file: str, fld: str) -> None:
    top = name.replace("/", ".").split(".")[0]
    if top not in TRUSTED_PACKAGES:
        raise input_error(file, f"config package {name!r} is outside {' / '.join(TRUSTED_PACKAGES)}; refused",
                          field=fld, hint="put your configs in a folder and pass --config-dir")


def check_config_dir(folder: Path, how: str = "--config-dir") -> None:
    """Check every .yaml/.yml file under `folder` (Hydra may read any of them)."""
    if not folder.is_dir():
        return  # Hydra reports a missing folder itself
    files = []
    for root, dirnames, names in os.walk(folder, followlinks=False):
        dirnames.sort()
        files += [Path(root) / n for n in sorted(names) if n.endswith((".yaml", ".yml"))]
        if len(files) > MAX_CONFIG_FILES:
            raise input_error(str(folder), f"holds more than {MAX_CONFIG_FILES} YAML files; not a config folder",
                              field=how, hint="pass the folder that holds your featuretex configs")
    for f in files:
        check_config_file(f, folder)


def _package_of(path: Path, config_root: Path, text: str) -> str:
    """Dotted key path where Hydra puts the file's content: its `# @package` line or its group."""
    group = ".".join(path.relative_to(config_root).parent.parts)
    for line in text.splitlines():
        s = line.strip()
        if not s.startswith("#"):
            break
        m = re.match(r"#\s*@package\s+(\S+)", s)
        if m:
            pkg = m.group(1).replace("_global_", "").replace("_group_", group)
            return pkg.strip(".")
    return group


def check_config_file(path: Path, config_root: Path) -> None:
    """Refuse one config YAML file that carries instantiation keys (see the module doc)."""
    file = str(path)
    try:
        if path.stat().st_size > MAX_CONFIG_BYTES:
            raise input_error(file, "too large to be a config file; refused", hint="is this the right folder?")
        text = path.read_text(encoding="utf-8")
        data = yaml.safe_load(text)
    except InputError:
        raise
    except (OSError, UnicodeDecodeError, yaml.YAMLError, RecursionError) as e:
        first = " ".join(str(e).split())[:160]
        raise input_error(file, f"cannot be checked, so it is refused: {first}",
                          hint="fix or remove the file from the config folder") from None
    check_value(_package_of(path, config_root, text), data, file)


def _join(prefix: str, key: Any) -> str:
    return f"{prefix}.{key}" if prefix else str(key)


def check_value(key: str, value: Any, file: str) -> None:
    """Refuse `value` placed at dotted `key` (an override or a YAML subtree) per the module doc."""
    parts = key.split(".") if key else []
    if parts and parts[-1] in INSTANTIATE_KEYS:  # an override that sets one key directly: `a.b._target_=x`
        _check_instantiate_key(key, {parts[-1]: value}, file)
    _check_hydra_specials(parts, value, file)
    if isinstance(value, dict):
        for k, v in value.items():
            sub = _join(key, k)
            if k in INSTANTIATE_KEYS:
                _check_instantiate_key(sub, value, file)
            check_value(sub, v, file)
    elif isinstance(value, list):
        for i, v in enumerate(value):
            check_value(f"{key}[{i}]" if key else f"[{i}]", v, file)
    elif isinstance(value, str):
        _check_text(key, value, file)


def _check_instantiate_key(key: str, siblings: dict, file: str) -> None:
    """`key` ends in one of INSTANTIATE_KEYS; `siblings` is the mapping that holds it."""
    name = key.rsplit(".", 1)[-1]
    if key.split(".")[0] != "hydra" or name == "_call_":
        raise input_error(file, f"'{name}' would make Hydra import and run an object; refused", field=key,
                          hint="featuretex never builds objects named in config; choose plugins by their "
                          "registered name (e.g. raster.backend=embree)")
    target = siblings.get("_target_")
    if not (isinstance(target, str) and target in ALLOWED_TARGETS):
        raise input_error(file, f"'{name}' with _target_ {shown(target)}, which is not one of featuretex's own "
                          "callbacks, launchers and sweepers; refused", field=key,
                          hint="Hydra may build only featuretex's batch index, its launchers "
                          "(hydra/launcher=pool, slurm, slurm_local) and Hydra's basic launcher and sweeper")


def _check_text(key: str, text: str, file: str) -> None:
    if _KEY_IN_TEXT.search(text):
        raise input_error(file, "a text value holds an object-building key "
                          f"({', '.join(m for m in INSTANTIATE_KEYS if m in text)}); refused", field=key)
    if _BUILDS_MAPPING.search(text):
        raise input_error(file, "an oc.create / oc.decode interpolation builds config from text; refused",
                          field=key, hint="write the mapping out in YAML")


def _check_hydra_specials(parts: list[str], value: Any, file: str) -> None:
    """hydra.job.env_set of loader variables, and non-empty hydra.launcher.setup shell lines."""
    key = ".".join(parts)
    if len(parts) == 4 and parts[:3] == ["hydra", "job", "env_set"] and _LOADER_ENV.match(parts[3]):
        raise input_error(file, f"setting {parts[3]} changes which code a process loads; refused", field=key)
    if parts == ["hydra", "launcher", "setup"] and value:
        raise input_error(file, "launcher 'setup' lines are shell commands run before the job; refused",
                          field=key, hint="prepare the cluster environment outside featuretex's config")


def check_output_dir(folder: Path) -> None:
    """Create the run folder and write and delete a small file in it. Raises OSError (with filename
    and strerror) on failure."""
    folder = Path(folder).expanduser()
    try:
        folder.mkdir(parents=True, exist_ok=True)
        with tempfile.NamedTemporaryFile(dir=folder, prefix=".featuretex-probe.") as f:
            f.write(b"\0" * 4096)
            f.flush()
            os.fsync(f.fileno())
    except OSError as e:
        raise OSError(e.errno, e.strerror or str(e), str(folder)) from None


# ---------------------------------------------------------------------------------------------
# the composed configuration
# ---------------------------------------------------------------------------------------------
COMPOSED = "configuration"   # the "file" named in messages about the composed configuration
RECORDS = ("overrides", "help", "hydra_help", "runtime")  # text Hydra keeps about the run, never built from


def check_composed(cfg: Any) -> None:
    """Refuse a composed configuration (a DictConfig with its `hydra` node) that would make Hydra
    build objects other than featuretex's own, or write outside the run folder (module doc)."""
    from omegaconf import OmegaConf

    tree = OmegaConf.to_container(cfg, resolve=False)
    assert isinstance(tree, dict)
    hydra = {k: v for k, v in tree.get("hydra", {}).items() if k not in RECORDS}
    check_value("", {**tree, "hydra": hydra}, COMPOSED)
    for key, want in RUN_FOLDER_KEYS.items():
        got = _raw(tree, key)
        if got != want:
            raise input_error(COMPOSED, f"{shown(got)} refused: the run folder is set by out= only", field=key,
                              hint=f"write out=DIR; featuretex keeps {key} at {want}")
    if _raw(tree, "hydra.job.chdir"):
        raise input_error(COMPOSED, "hydra.job.chdir=true would run the job inside its output folder; refused",
                          field="hydra.job.chdir", hint="paths are read relative to where featuretex starts")
    for part in ("job_logging", "hydra_logging"):
        _check_logging(_raw(tree, f"hydra.{part}") or {}, f"hydra.{part}")
    folder = _raw(tree, "hydra.launcher.submitit_folder")
    if folder is not None and not _inside_interpolation(folder, "${hydra.sweep.dir}"):
        raise input_error(COMPOSED, f"submitit_folder {shown(folder)} lies outside the sweep folder; refused",
                          field="hydra.launcher.submitit_folder")


def _raw(tree: Any, key: str) -> Any:
    for part in key.split("."):
        if not isinstance(tree, dict) or part not in tree:
            return None
        tree = tree[part]
    return tree


def _inside_interpolation(value: Any, root: str) -> bool:
    """`value` is `root` or `root/<relative path without ..>`."""
    if not isinstance(value, str) or not (value == root or value.startswith(root + "/")):
        return False
    return ".." not in Path(value[len(root):].lstrip("/")).parts


def _check_logging(node: Any, where: str) -> None:
    """Python's logging.config builds handlers from `class` and calls any `()` factory: only the
    standard library's handlers, log files inside the job's output folder."""
    if isinstance(node, dict):
        for k, v in node.items():
            key = f"{where}.{k}"
            if k == "()":
                raise input_error(COMPOSED, "a logging factory '()' would import and call an object; refused", field=key)
            if k == "class" and v not in LOG_HANDLER_CLASSES and not str(v).startswith("logging.Formatter"):
                raise input_error(COMPOSED, f"log handler class {shown(v)} refused", field=key,
                                  hint=f"use one of {', '.join(sorted(LOG_HANDLER_CLASSES))}")
            if k == "filename" and not _inside_interpolation(v, "${hydra.runtime.output_dir}"):
                raise input_error(COMPOSED, f"log file {shown(v)} lies outside the run folder; refused", field=key)
            _check_logging(v, key)
    elif isinstance(node, list):
        for i, v in enumerate(node):
            _check_logging(v, f"{where}[{i}]")
