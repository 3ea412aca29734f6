"""The command line as a person types it -> the command line Hydra parses.

    featuretex PATH [out=DIR] [overrides...]          PATH: a scene.yaml or its folder (or demo)
    featuretex scene=PATH [out=DIR] [overrides...]
    featuretex -m PATH PATH ... out=DIR [overrides...]  a batch: one job per scene

Hydra's override grammar takes an unquoted value only in plain ASCII without commas, spaces,
quotes or `${`: a folder named `Müller/`, `my scans ü 漢字/`, `jug,v2/` or `jug${x}/` would be a
syntax error, a sweep or an interpolation there. So paths are quoted for Hydra here:

* an argument that is not an option and holds no `=` is a scene path (one for a run; any number
  with `-m`);
* `out=` is always one path (without `${`: Hydra resolves the run folder's name inside its own
  settings, so an output folder name may not hold it; scene folders may);
* `scene=` is one path in a single run. In a batch (`-m`) a value that names an existing file or
  folder is one path; otherwise commas separate scenes. Hydra's sweep functions (`glob(...)`,
  `range(...)`, `choice(...)`) and values already in quotes are passed on as written.

`demo` (as PATH or `scene=demo`) always means the bundled demo scene; write `./demo` for a folder
of that name.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

from featuretex.errors import InputError

PATH_KEYS = ("scene", "out")
_SWEEP_FUNCTION = re.compile(r"^\s*[A-Za-z_]+\s*\(")
_QUOTED = re.compile(r"""^\s*(['"]).*\1\s*$""", re.S)


@dataclass
class Arguments:
    argv: list[str]          # for Hydra: options as given, then the overrides with paths quoted
    overrides: list[str]     # the overrides part of argv
    multirun: bool
    runs_job: bool           # a run or a batch (not --help, --cfg, --info, ...)


def hydra_quote(text: str) -> str:
    """`text` as one single-quoted Hydra value that reads back as exactly `text` (checked)."""
    body = re.sub(r"(\\*)'", lambda m: m.group(1) * 2 + "\\'", text)   # \' for a quote, backslashes before it doubled
    body = re.sub(r"(\\+)$", lambda m: m.group(1) * 2, body)           # and before the closing quote
    quoted = "'" + body.replace("${", "\\${") + "'"                    # no interpolation: taken as written
    if _read_back(quoted) != text:
        raise InputError(f"command line: the path {text!r} cannot be passed on to Hydra "
                         "(rename the folder, or start featuretex from inside it)")
    return quoted


def _read_back(value: str) -> object:
    """What Hydra and OmegaConf make of `key=<value>`: the parsed, resolved value."""
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from omegaconf import OmegaConf

    try:
        parsed = OverridesParser.create().parse_overrides([f"k={value}"])[0].value()
        return OmegaConf.create({"k": parsed}).k
    except Exception:  # noqa: BLE001 (any failure means the text does not survive the round trip)
        return None


def _is_path_override(arg: str) -> tuple[str, str, str] | None:
    """(prefix, key, value) of `scene=...` / `out=...` (also with + or ++), else None."""
    m = re.match(r"^(\+{0,2})(scene|out)=(.*)$", arg, re.S)
    return (m.group(1), m.group(2), m.group(3)) if m else None


def _scene_value(value: str, multirun: bool) -> str:
    if _QUOTED.match(value) or _SWEEP_FUNCTION.match(value):
        return value
    if not multirun or value == "" or Path(value).expanduser().exists():
        return hydra_quote(value)
    return ",".join(hydra_quote(v) for v in value.split(","))


def _rewrite(arg: str, multirun: bool) -> str | None:
    """An override with its path quoted; None to drop it (`out=` empty or null: the default folder)."""
    parts = _is_path_override(arg)
    if parts is None:
        return arg
    prefix, key, value = parts
    if key == "out":
        if value in ("", "null") and not prefix:
            return None
        if "${" in value:   # Hydra puts the run folder into its own interpolations (log file, job folders)
            raise InputError(f"command line: out {value!r} holds '${{', which Hydra would read as a reference; "
                             "choose an output folder name without it")
        return arg if _QUOTED.match(value) else f"{prefix}out={hydra_quote(value)}"
    return f"{prefix}scene={_scene_value(value, multirun)}"


def _split(argv: list[str]) -> tuple[list[str], list[str]]:
    """(options with their values, positional arguments) as Hydra's own argument parser sees them."""
    from hydra._internal.utils import get_args_parser

    takes_value: dict[str, tuple | None] = {}
    for action in get_args_parser()._actions:
        if action.option_strings and action.nargs != 0:
            for opt in action.option_strings:
                takes_value[opt] = tuple(action.choices) if action.nargs == "?" else None
    options, positional = [], []
    i = 0
    while i < len(argv):
        a = argv[i]
        if a.startswith("-") and a.split("=", 1)[0] in takes_value or a in takes_value:
            options.append(a)
            optional = takes_value.get(a)
            if "=" not in a and i + 1 < len(argv) and (optional is None or argv[i + 1] in optional):
                options.append(argv[i + 1])
                i += 1
        elif a.startswith("-") and not _is_path_override(a):
            options.append(a)
        else:
            positional.append(a)
        i += 1
    return options, positional


def parse(argv: list[str]) -> Arguments:
    """Rewrite the command line for Hydra (see the module doc). Raises InputError."""
    options, positional = _split(argv)
    flags = set(options)
    multirun = bool(flags & {"-m", "--multirun"})
    runs_job = not flags & {"-h", "--help", "--hydra-help", "--version", "-c", "--cfg", "-i", "--info",
                            "-sc", "--shell-completion", "--resolve"} and \
        not any(o.startswith(("--cfg=", "--info=")) for o in options)
    plain = [a for a in positional if "=" not in a and not a.startswith("~")]
    overrides = [r for r in (_rewrite(a, multirun) for a in positional if a not in plain) if r is not None]
    if plain:
        if any((_is_path_override(o) or ("", "", ""))[1] == "scene" for o in overrides):
            raise InputError("command line: the scene is given twice (as a path and as scene=); give one")
        if len(plain) > 1 and not multirun:
            raise InputError(f"command line: {len(plain)} scenes given ({', '.join(map(repr, plain[:3]))}"
                             f"{', ...' if len(plain) > 3 else ''}); add -m to run them as a batch")
        overrides.insert(0, "scene=" + ",".join(hydra_quote(p) for p in plain))
    return Arguments(argv=options + overrides, overrides=overrides, multirun=multirun, runs_job=runs_job)
