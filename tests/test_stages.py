"""The stage book: every stage records its key, seconds and declared files the same way, and a
stage counts as done only while every file it declared exists (an OBJ-only export included)."""

from __future__ import annotations

import dataclasses
import json
import os

import numpy as np
import pytest

from featuretex.config import FeaturetexConfig
from featuretex.png import write_texture_png
from featuretex.pipeline import stage_export
from featuretex.run import RunContext
from featuretex.scene.loaded import load_scene
from featuretex.stages import StageBook
from tests.scenes import smooth_texture, sphere_scene

os.environ.setdefault("PYOPENGL_PLATFORM", "egl")


def test_run_records_declared_and_produced_files_and_redoes_when_one_is_missing(tmp_path):
    calls = []

    def compute():
        calls.append(1)
        for name in ("a.txt", "b.txt"):
            (tmp_path / name).write_text(name)
        return "value"

    book = StageBook(tmp_path)
    assert book.run("s", "k1", [tmp_path / "a.txt"], compute, lambda: "loaded",
                    produced=lambda _: [tmp_path / "b.txt"]) == "value"
    rec = json.loads((tmp_path / "stages.json").read_text())["s"]
    assert rec["key"] == "k1" and rec["artefacts"] == ["a.txt", "b.txt"]
    again = StageBook(tmp_path)
    assert again.run("s", "k1", [tmp_path / "a.txt"], compute, lambda: "loaded") == "loaded" and len(calls) == 1
    (tmp_path / "b.txt").unlink()             # a file known only from the record
    assert not StageBook(tmp_path).done("s", "k1", [tmp_path / "a.txt"])
    assert StageBook(tmp_path).run("s", "k1", [tmp_path / "a.txt"], compute, lambda: "loaded") == "value"
    assert not StageBook(tmp_path).done("s", "k2", [tmp_path / "a.txt"])   # another key


def test_run_cached_keeps_recorded_seconds_only_without_new_work(tmp_path):
    book = StageBook(tmp_path)
    (tmp_path / "f").write_text("x")
    book.run_cached("c", "k", lambda: (1, True), lambda _: [tmp_path / "f"], seconds=lambda _: 12.5)
    rec = json.loads((tmp_path / "stages.json").read_text())["c"]
    assert rec == {"key": "k", "seconds": 12.5, "artefacts": ["f"]}
    again = StageBook(tmp_path)
    again.run_cached("c", "k", lambda: (1, False), lambda _: [tmp_path / "f"], seconds=lambda _: 99.0)
    assert again.timings["c"] == 12.5                       # nothing redone: the recorded time stands
    again.run_cached("c", "k2", lambda: (1, False), lambda _: [tmp_path / "f"], seconds=lambda _: 3.0)
    assert again.timings["c"] == 3.0 and json.loads((tmp_path / "stages.json").read_text())["c"]["key"] == "k2"


@pytest.fixture(scope="module")
def small_scene(tmp_path_factory):
    path, _ = sphere_scene(tmp_path_factory.mktemp("sphere"), texture=smooth_texture(64), n_views=3,
                           size=(64, 48), holdout_every=3)
    return load_scene(path)


def test_obj_only_export_is_done_only_while_every_declared_file_exists(tmp_path, small_scene):
    cfg = FeaturetexConfig()
    cfg = dataclasses.replace(cfg, export=dataclasses.replace(cfg.export, formats=["obj"]))
    out = tmp_path / "run"
    write_texture_png(out / "texture.png", np.full((16, 16, 3), 0.5, np.float32))
    ctx = RunContext(scene=small_scene, cfg=cfg, out=out, book=StageBook(out))
    written = stage_export(ctx, "key")
    assert sorted(p.name for p in written) == ["model.mtl", "model.obj"]
    declared = json.loads((out / "stages.json").read_text())["export"]["artefacts"]
    assert sorted(declared) == ["model.mtl", "model.obj", "texture.png"]
    before = (out / "model.mtl").read_bytes()
    (out / "model.mtl").unlink()
    ctx2 = RunContext(scene=small_scene, cfg=cfg, out=out, book=StageBook(out))
    assert not ctx2.book.done("export", "key", [])
    stage_export(ctx2, "key")                               # the missing file is exported again
    assert (out / "model.mtl").read_bytes() == before
