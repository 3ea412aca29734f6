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
* under `hydra.` (callbacks, launcher, sweeper): a `_target_` that is not a dotted name inside
  `featuretex.` or `hydra_plugins.`, `_call_`, and the other keys beside a refused `_target_`;
* any text value that spells one of those keys or builds a mapping from text (`oc.create`,
  `oc.decode` interpolations), which could smuggle one in;
* `hydra.job.env_set` of variables that change what code a process loads (`LD_*`, `DYLD_*`,
  `PYTHON*`), and `hydra.launcher.setup` (shell lines a cluster launcher runs before the job);
* `pkg://` search paths outside `featuretex` / `hydra_plugins`, and `--experimental-rerun`
  (it loads a pickle, which can run anything).

`check_output_dir(argv)` (also before Hydra, which creates the run folder and writes `.hydra/`
before any featuretex code runs, and reports a failure there as a traceback) makes sure the
output folder can be created and written, raising the OSError of the first thing that fails.
"""

from __future__ import annotations

import os
import re
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import yaml

from featuretex.errors import InputError, input_error

INSTANTIATE_KEYS = ("_target_", "_call_", "_args_", "_partial_", "_recursive_", "_convert_")
TRUSTED_TARGET = re.compile(r"^(featuretex|hydra_plugins)(\.[A-Za-z_][A-Za-z0-9_]*)+$")
TRUSTED_PACKAGES = ("featuretex", "hydra_plugins")
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
    roots = [PACKAGE_DIR / "conf"] + [d for d, _ in dirs]
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
    if not (isinstance(target, str) and TRUSTED_TARGET.match(target)):
        shown = target if isinstance(target, str) and len(target) < 80 else type(target).__name__
        raise input_error(file, f"'{name}' with _target_ {shown!r}, which is not inside "
                          f"{' / '.join(p + '.' for p in TRUSTED_PACKAGES)}; refused", field=key,
                          hint="Hydra callbacks, launchers and sweepers must come from featuretex or an "
                          "installed Hydra plugin")


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


def _out_override(argv: list[str]) -> tuple[str | None, bool]:
    """(value of `out=` or None, multirun?) from the command line, parsed as Hydra parses it."""
    from hydra._internal.utils import get_args_parser

    try:
        args, _ = get_args_parser().parse_known_args(argv)
    except SystemExit:
        return None, False
    out = None
    for key, value, _ in _overrides(args.overrides or []):
        if key == "out" and isinstance(value, str):
            out = value
    return out, bool(args.multirun)


def check_output_dir(argv: list[str]) -> None:
    """Create the run folder named by `out=` (else Hydra's default parent, runs/ or multirun/) and
    write and delete a small file in it. Raises OSError (with filename and strerror) on failure."""
    out, multirun = _out_override(argv)
    folder = Path(out if out else ("multirun" if multirun else "runs")).expanduser()
    if "${" in str(folder):       # an interpolation: only Hydra can resolve it
        return
    folder.mkdir(parents=True, exist_ok=True)
    try:
        with tempfile.NamedTemporaryFile(dir=folder, prefix=".featuretex-probe.") as f:
            f.write(b"\0" * 4096)
            f.flush()
            os.fsync(f.fileno())
    except OSError as e:
        raise OSError(e.errno, e.strerror or str(e), str(folder)) from None
