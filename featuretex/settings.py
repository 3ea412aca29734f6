"""Every setting checked in one place, before any stage runs, from the settings dataclasses.

A settings dataclass declares what each field allows beside its default, with `setting(...)`:

    steps: int = setting(600, ge=0)                       # optimisation steps
    precision: str = setting("auto", choices=("auto", "float32", "bfloat16"))
    decoder: str = setting("texel-screen", plugin="decoders")
    size: int = setting(0, ge=0, le=16384, check=lambda v: v == 0 or v >= 16, expect="0 or 16..16384")

Every field is checked, declared or not: the value has the field's type (a bool is not a number,
a float field takes a whole number), and a number is finite unless `finite=False`. Then the
declared bounds (`ge`, `gt`, `le`, `lt`), `choices`, `odd`, `plugin` (a registered plugin name of that
kind; for a list, every element) and `check` (a predicate, described by `expect`). Relations between
fields go in a method `relations(self)` of the dataclass that yields (field, what is wrong) pairs.

`check_settings(cfg)` walks a dataclass tree and raises InputError with one line that names the
key, the value and what is allowed: `setting 'texture.bits' = 12: allowed 8 or 16`.
"""

from __future__ import annotations

import copy
import dataclasses
import difflib
import math
import reprlib
import types
import typing
from collections.abc import Callable, Iterator
from typing import Any

from featuretex.errors import InputError

VALUE_CHARS = 80   # at most this much of a value is quoted in a message


def setting(default: Any, *, ge: float | None = None, gt: float | None = None, le: float | None = None,
            lt: float | None = None, choices: tuple | None = None, plugin: str | None = None,
            odd: bool = False, finite: bool = True, check: Callable[[Any], bool] | None = None,
            expect: str | None = None) -> Any:
    """A dataclass field with its default and what it allows (see the module doc)."""
    meta = {"ge": ge, "gt": gt, "le": le, "lt": lt, "choices": choices, "plugin": plugin, "odd": odd,
            "finite": finite, "check": check, "expect": expect}
    if isinstance(default, (list, dict)):
        return dataclasses.field(default_factory=lambda: copy.deepcopy(default), metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


_REPR = reprlib.Repr()
_REPR.maxlevel, _REPR.maxstring, _REPR.maxother, _REPR.maxlong = 3, VALUE_CHARS, VALUE_CHARS, VALUE_CHARS
_REPR.maxlist = _REPR.maxtuple = _REPR.maxdict = _REPR.maxset = 8


def shown(value: Any, limit: int = VALUE_CHARS) -> str:
    """A user's value for a one-line message: repr() of text, str() of a number, at most `limit`
    characters. Containers are shown by their first items only, never rendered whole: a value can
    be huge (a YAML file of nested aliases expands to billions of items)."""
    try:
        text = str(value) if isinstance(value, (bool, float)) else _REPR.repr(value)
    except ValueError:          # an integer too long to print
        text = "a number of more than 4000 digits"
    text = " ".join(text.split())
    return text if len(text) <= limit else text[: limit - 3] + "..."


def one_of(choices: Any) -> str:
    items = [shown(c) for c in choices]
    return " or ".join(items) if len(items) <= 2 else "one of " + ", ".join(items)


def refuse(key: str, value: Any, allowed: str) -> InputError:
    return InputError(f"setting '{key}' = {shown(value)}: allowed {allowed}")


# ---------------------------------------------------------------------------------------------
# types
# ---------------------------------------------------------------------------------------------
def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _type_ok(v: Any, tp: Any) -> tuple[bool, str]:
    """(value matches the annotation, how to describe the annotation)."""
    origin = typing.get_origin(tp)
    if tp is Any:
        return True, "anything"
    if origin in (typing.Union, types.UnionType):
        results = [_type_ok(v, a) for a in typing.get_args(tp)]
        return any(ok for ok, _ in results), " or ".join(d for _, d in results)
    if tp is type(None):
        return v is None, "null"
    if tp is bool:
        return isinstance(v, bool), "true or false"
    if tp is int:
        return _is_int(v), "a whole number"
    if tp is float:
        return _is_int(v) or isinstance(v, float), "a number"
    if tp is str:
        return isinstance(v, str), "text"
    if origin in (list, tuple):
        inner = typing.get_args(tp)[0] if typing.get_args(tp) else Any
        ok = isinstance(v, (list, tuple)) and all(_type_ok(x, inner)[0] for x in v)
        return ok, f"a list of {_type_ok(None, inner)[1]}"
    return True, str(tp)


def describe_type(tp: Any) -> str:
    """An annotation in words ("a whole number", "true or false", ...)."""
    return _type_ok(None, tp)[1]


def _bounds_text(meta: dict) -> str:
    parts = []
    lo = (">=", meta["ge"]) if meta["ge"] is not None else (">", meta["gt"]) if meta["gt"] is not None else None
    hi = ("<=", meta["le"]) if meta["le"] is not None else ("<", meta["lt"]) if meta["lt"] is not None else None
    if lo and hi and lo[0] == ">=" and hi[0] == "<=":
        return f"{lo[1]:g}..{hi[1]:g}"
    for b in (lo, hi):
        if b:
            parts.append(f"{b[0]} {b[1]:g}")
    return " and ".join(parts)


def _allowed(meta: dict, type_text: str) -> str:
    """What a field allows, in words."""
    if meta["expect"]:
        return meta["expect"]
    if meta["choices"]:
        return one_of(meta["choices"])
    text = "an odd whole number" if meta["odd"] else \
        "a finite number" if type_text == "a number" and meta["finite"] else type_text
    b = _bounds_text(meta)
    return f"{text} {b}" if b else text


def _in_bounds(v: float, meta: dict) -> bool:
    return not ((meta["ge"] is not None and not v >= meta["ge"]) or (meta["gt"] is not None and not v > meta["gt"])
                or (meta["le"] is not None and not v <= meta["le"]) or (meta["lt"] is not None and not v < meta["lt"]))


def plugin_names(kind: str) -> list[str]:
    from featuretex import plugins

    return sorted(plugins.available(kind))


# ---------------------------------------------------------------------------------------------
# the check
# ---------------------------------------------------------------------------------------------
def check_value(key: str, v: Any, tp: Any, meta: dict) -> None:
    """Raise InputError when `v` is not allowed for a field of annotation `tp` with metadata `meta`."""
    meta = {"ge": None, "gt": None, "le": None, "lt": None, "choices": None, "plugin": None, "odd": False,
            "finite": True, "check": None, "expect": None, **meta}
    ok, type_text = _type_ok(v, tp)
    if not ok:
        raise refuse(key, v, meta["expect"] or type_text)
    if isinstance(v, float) and meta["finite"] and not math.isfinite(v):
        raise refuse(key, v, _allowed(meta, type_text))
    if meta["choices"] is not None and v not in meta["choices"]:
        raise refuse(key, v, _allowed(meta, type_text))
    if (_is_int(v) or isinstance(v, float)) and not _in_bounds(v, meta):
        raise refuse(key, v, _allowed(meta, type_text))
    if meta["odd"] and _is_int(v) and v % 2 == 0:
        raise refuse(key, v, _allowed(meta, type_text))
    if meta["plugin"] is not None:
        names = plugin_names(meta["plugin"])
        for item in (v if isinstance(v, (list, tuple)) else [v]):
            if item not in names:
                kind = meta["plugin"].rstrip("s")
                raise refuse(key, item if isinstance(v, (list, tuple)) else v,
                             f"a registered {kind} plugin: {', '.join(names) or 'none installed'}")
    if meta["check"] is not None and not meta["check"](v):
        raise refuse(key, v, _allowed(meta, type_text))


def check_settings(cfg: Any, prefix: str = "") -> None:
    """Check every field of the settings dataclass `cfg` and of the dataclasses inside it."""
    hints = typing.get_type_hints(type(cfg))
    for f in dataclasses.fields(cfg):
        key = f"{prefix}{f.name}"
        v = getattr(cfg, f.name)
        if dataclasses.is_dataclass(v):
            check_settings(v, key + ".")
            continue
        check_value(key, v, hints.get(f.name, Any), dict(f.metadata))
    relations = getattr(cfg, "relations", None)
    for name, what in (relations() if callable(relations) else ()):
        raise InputError(f"setting '{prefix}{name}' = {shown(getattr(cfg, name))}: {what}")


def field_spec(schema: type, dotted: str) -> tuple[Any, dict] | None:
    """(annotation, metadata) of the field at `dotted` in the dataclass `schema`, None if there is none."""
    cls, parts = schema, dotted.split(".")
    for i, part in enumerate(parts):
        if not (isinstance(cls, type) and dataclasses.is_dataclass(cls)):
            return None
        fields = {f.name: f for f in dataclasses.fields(cls)}
        if part not in fields:
            return None
        tp = typing.get_type_hints(cls)[part]
        if i == len(parts) - 1:
            return tp, dict(fields[part].metadata)
        cls = tp
    return None


def all_keys(schema: type, prefix: str = "") -> Iterator[str]:
    """Every dotted key of the dataclass tree `schema`, sections included."""
    hints = typing.get_type_hints(schema)
    for f in dataclasses.fields(schema):
        key = f"{prefix}{f.name}"
        yield key
        tp = hints.get(f.name)
        if isinstance(tp, type) and dataclasses.is_dataclass(tp):
            yield from all_keys(tp, key + ".")


def unknown_setting(schema: type, key: str) -> InputError:
    """'unknown setting' with the closest known key, when one is close."""
    keys = list(all_keys(schema))
    near = difflib.get_close_matches(key, keys, n=1, cutoff=0.6)
    if not near:   # a close leaf name under another section (fit.gutter -> texture.gutter)
        leaf = key.rsplit(".", 1)[-1]
        near = [k for k in keys if k.rsplit(".", 1)[-1] == leaf][:1]
    hint = f" (did you mean '{near[0]}'?)" if near else " (featuretex --cfg job lists every setting)"
    return InputError(f"unknown setting '{key}'{hint}")
