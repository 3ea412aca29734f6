"""Plugin registry: decoders, losses, rasterisers and exporters found by *name* through entry points.

Group names are `featuretex.<kind>` (kinds: decoders, losses, rasterisers, exporters). Config
selects a plugin by its registered name only; nothing named in a user's YAML is ever imported.
"""

from __future__ import annotations

import importlib
from importlib.metadata import entry_points
from typing import Any

from featuretex.errors import InputError

KINDS = ("decoders", "losses", "rasterisers", "exporters")
_BUILTIN: dict[str, dict[str, str]] = {k: {} for k in KINDS}  # kind -> name -> "module:attr"
# packages whose import registers the built-ins of a kind (light: they import no plugin code)
_REGISTERED_BY = {"decoders": "featuretex.model", "exporters": "featuretex.export"}


def register_builtin(kind: str, name: str, target: str) -> None:
    """Register a plugin that ships with featuretex (also declared in pyproject's entry points)."""
    _BUILTIN[kind][name] = target


def available(kind: str) -> dict[str, str]:
    """name -> "module:attr" for every plugin of `kind` (entry points override nothing built in)."""
    if kind in _REGISTERED_BY:
        importlib.import_module(_REGISTERED_BY[kind])
    found = {ep.name: ep.value for ep in entry_points(group=f"featuretex.{kind}")}
    found.update(_BUILTIN[kind])
    return found


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


register_builtin("rasterisers", "embree", "featuretex.raster.embree:EmbreeRasteriser")
