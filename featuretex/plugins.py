"""Plugin registry: decoders, rasterisers and exporters found by *name* through entry points.

Group names are `featuretex.<kind>` (kinds: decoders, rasterisers, exporters). The built-ins are
declared the same way, in featuretex's own pyproject.toml, so every plugin comes through one path.
Config selects a plugin by its registered name only; nothing named in a user's YAML is ever imported.
"""

from __future__ import annotations

import importlib
from importlib.metadata import entry_points
from typing import Any

from featuretex.errors import InputError

KINDS = ("decoders", "rasterisers", "exporters")


def available(kind: str) -> dict[str, str]:
    """name -> "module:attr" for every installed plugin of `kind`."""
    return {ep.name: ep.value for ep in entry_points(group=f"featuretex.{kind}")}


def load(kind: str, name: str) -> Any:
    """Return the object registered as `name` in group `featuretex.<kind>`; InputError if unknown."""
    if kind not in KINDS:
        raise ValueError(f"unknown plugin kind {kind!r}")
    table = available(kind)
    if name not in table:
        raise InputError(f"config: no {kind[:-1]} plugin named {name!r}; registered: "
                         f"{', '.join(sorted(table)) or 'none'}")
    module, _, attr = table[name].partition(":")
    obj: Any = importlib.import_module(module)
    for part in attr.split("."):
        obj = getattr(obj, part)
    return obj
