"""Property tests of the manifest reader: whatever scene.yaml holds, read_manifest either returns a
Manifest or raises featuretex.errors.InputError (whose text is one line) - never anything else.

Three generators: arbitrary YAML documents; a valid manifest with random values at random
places (every field, any YAML type, keys deleted or added); arbitrary bytes and text. The camera
round trip has its own property test in tests/test_camera.py.
"""

from __future__ import annotations

import copy
import math
from pathlib import Path

import numpy as np
import pytest
import yaml
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from featuretex.errors import InputError
from featuretex.scene.manifest import Manifest, read_manifest

SETTINGS = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])

VALID = {
    "format": "featuretex-scene/1",
    "mesh": "mesh.obj",
    "unit": "meter",
    "cameras": {"cam0": {"model": "brown", "width": 8, "height": 6, "fx": 8.0, "fy": 8.0, "cx": 3.5, "cy": 2.5,
                         "distortion": [0.01, 0.0, 0.0, 0.0, 0.0]}},
    "views": [{"name": f"v{i}", "image": f"images/v{i}.png", "mask": f"masks/v{i}.png", "camera": "cam0",
               "world_to_camera": [[1.0, 0.0, 0.0, 0.0], [0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 1.0, 2.0]],
               "holdout": i == 2} for i in range(3)],
}


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    """A scene folder with the files VALID names (the reader checks they exist, it does not decode)."""
    root = tmp_path_factory.mktemp("props")
    (root / "images").mkdir()
    (root / "masks").mkdir()
    (root / "mesh.obj").write_text("v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    for i in range(3):
        (root / "images" / f"v{i}.png").write_bytes(b"")
        (root / "masks" / f"v{i}.png").write_bytes(b"")
    (root.parent / "outside.png").write_bytes(b"")
    return root


scalars = (st.none() | st.booleans() | st.integers() | st.integers(min_value=-(10 ** 400), max_value=10 ** 400)
           | st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=12)
           | st.sampled_from(["", "..", "../outside.png", "/etc/hostname", "images", "images/v0.png", "cam0",
                              "meter", "pinhole", "brown", "featuretex-scene/1", "a\x00b", "x" * 300, "\n",
                              10 ** 400, -(10 ** 400), 2 ** 63, 0, -1, 1e308, 5e-324, float("nan")]))
keys = st.text(max_size=8) | st.integers(-3, 3) | st.sampled_from(sorted(
    {"format", "mesh", "unit", "cameras", "views", "name", "image", "mask", "camera", "world_to_camera",
     "holdout", "model", "width", "height", "fx", "fy", "cx", "cy", "distortion"}))
values = st.recursive(scalars, lambda kids: st.lists(kids, max_size=5) | st.dictionaries(keys, kids, max_size=5),
                      max_leaves=25)


def _paths(node, prefix=()) -> list[tuple]:
    """Every key path into a nested dict/list structure (the root included)."""
    out = [prefix]
    if isinstance(node, dict):
        for k, v in node.items():
            out += _paths(v, prefix + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            out += _paths(v, prefix + (i,))
    return out


def _mutate(doc, path: tuple, action: str, value):
    """Replace (or delete, or add a sibling key beside) the node at `path`; return the new document."""
    if not path:
        return value
    parent = doc
    for k in path[:-1]:
        parent = parent[k]
    last = path[-1]
    if action == "delete":
        del parent[last]
    elif action == "add" and isinstance(parent, dict):
        parent[f"extra_{last}"] = value
    else:
        parent[last] = value
    return doc


def _dump(doc) -> str:
    return yaml.safe_dump(doc, allow_unicode=True, sort_keys=False)  # keys may mix text and numbers


def _read(folder: Path, text: str | bytes):
    p = folder / "scene.yaml"
    if isinstance(text, bytes):
        p.write_bytes(text)
    else:
        p.write_text(text, encoding="utf-8")
    try:
        return read_manifest(p)
    except InputError as e:
        msg = str(e)
        assert msg and "\n" not in msg, repr(msg)   # one line for the terminal
        return e


def test_valid_manifest_is_accepted(folder):
    """The base document is valid, so the mutations below start from an accepted scene."""
    m = _read(folder, _dump(VALID))
    assert isinstance(m, Manifest) and len(m.fitted) == 2 and len(m.heldout) == 1


@SETTINGS
@given(data=st.data())
def test_valid_manifest_with_one_random_leaf_raises_only_input_error(folder, data):
    """Every field in turn gets a random scalar: the cheapest way to hit each type check."""
    doc = copy.deepcopy(VALID)
    leaves = [p for p in _paths(doc) if p and not isinstance(_get(doc, p), (dict, list))]
    path = data.draw(st.sampled_from(leaves), label="path")
    _read(folder, _dump(_mutate(doc, path, "replace", data.draw(scalars, label="value"))))


def _get(doc, path: tuple):
    for k in path:
        doc = doc[k]
    return doc


@SETTINGS
@given(doc=values)
def test_arbitrary_documents_raise_only_input_error(folder, doc):
    _read(folder, _dump(doc))


@SETTINGS
@given(data=st.data(), n=st.integers(1, 3))
def test_valid_manifest_with_random_fields_raises_only_input_error(folder, data, n):
    doc = copy.deepcopy(VALID)
    for _ in range(n):
        path = data.draw(st.sampled_from(_paths(doc)), label="path")
        action = data.draw(st.sampled_from(["replace", "delete", "add"]), label="action") if path else "replace"
        doc = _mutate(doc, path, action, data.draw(values, label="value"))
    _read(folder, _dump(doc))


@SETTINGS
@given(raw=st.binary(max_size=300) | st.text(max_size=300))
@example(raw=b"\xff\xfe\x00")
@example(raw="a: &x [*x]")               # recursive alias
@example(raw="[" * 5000)                 # deep nesting
@example(raw="format: !!python/object/apply:os.system [echo hi]")
@example(raw="a: 1\na: 2")
def test_arbitrary_bytes_raise_only_input_error(folder, raw):
    _read(folder, raw)


@SETTINGS
@given(pose=st.lists(st.lists(st.floats(allow_nan=True, allow_infinity=True)
                              | st.integers(-(10 ** 400), 10 ** 400), min_size=0,
                              max_size=5), min_size=0, max_size=5))
def test_random_poses_are_rotations_or_refused(folder, pose):
    doc = copy.deepcopy(VALID)
    doc["views"][0]["world_to_camera"] = pose
    out = _read(folder, _dump(doc))
    if isinstance(out, Manifest):   # accepted: the stored block is a rotation to machine precision
        R = out.views[0].R
        assert np.allclose(R.T @ R, np.eye(3), atol=1e-12) and math.isclose(np.linalg.det(R), 1.0, abs_tol=1e-12)
