"""Every plugin, built-ins included, comes through one path: the entry-point groups
`featuretex.<kind>`. References outside the project: the groups as pyproject.toml declares them
(read with the standard library's TOML parser) and the installed metadata (importlib.metadata)."""

from __future__ import annotations

import importlib
import tomllib
from pathlib import Path

import pytest

from featuretex import plugins
from featuretex.errors import InputError

ROOT = Path(__file__).resolve().parents[1]
DECLARED = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["entry-points"]


def test_pyproject_declares_a_group_for_every_kind_and_no_other():
    assert sorted(g for g in DECLARED if g.startswith("featuretex.")) == sorted(f"featuretex.{k}" for k in plugins.KINDS)


@pytest.mark.parametrize("kind", plugins.KINDS)
def test_builtins_are_found_as_declared_and_load(kind):
    declared = DECLARED[f"featuretex.{kind}"]
    found = plugins.available(kind)
    assert declared and {n: found.get(n) for n in declared} == declared, "run pip install -e . after changing them"
    for name, target in declared.items():
        module, _, attr = target.partition(":")
        assert plugins.load(kind, name) is getattr(importlib.import_module(module), attr)


def test_entry_points_are_the_only_source(monkeypatch):
    """With no entry points installed, no kind has a plugin: nothing registers by import."""
    monkeypatch.setattr(plugins, "entry_points", lambda group: [])
    for kind in plugins.KINDS:
        assert plugins.available(kind) == {}
    with pytest.raises(InputError, match="no decoder plugin named 'texel'; registered: none"):
        plugins.load("decoders", "texel")


def test_unknown_name_and_kind():
    with pytest.raises(InputError, match=r"registered: glb, obj"):
        plugins.load("exporters", "fbx")
    with pytest.raises(ValueError, match="unknown plugin kind"):
        plugins.load("losses", "l1")
