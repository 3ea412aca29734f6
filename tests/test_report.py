"""The per-run report and its parts: regions against scikit-image, texel areas against trimesh,
turntable frames against trimesh's own (non-Embree) ray caster, curves against matplotlib's
artists, and the page itself: self-contained, every number from summary.json, missing parts named."""

from __future__ import annotations

import base64
import hashlib
import io
import json
import math
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import trimesh
from PIL import Image

from featuretex.diagnose.classify import FINE, GEOMETRY, OFF, TEXTURE, UNCOVERED
from featuretex.report import errormap, plots, turntable
from featuretex.report.html import write_report
from featuretex.report.inline import num
from featuretex.report.verdicts import describe


# ---------------------------------------------------------------------------------------------
# error-map regions
# ---------------------------------------------------------------------------------------------
def _fields(cls: np.ndarray) -> errormap.ErrorFields:
    T = cls.shape[0]
    rng = np.random.default_rng(0)
    return errormap.ErrorFields(cls=cls, geometry=rng.uniform(0, 1, (T, T)).astype(np.float32),
                                texture=rng.uniform(0, 1, (T, T)).astype(np.float32),
                                displacement=np.full((T, T), np.nan, np.float32),
                                weight=(cls != OFF).astype(np.float64), position=None, area_known=False)


def test_regions_match_scikit_image_regionprops():
    from skimage.measure import label, regionprops

    T = 96
    cls = np.full((T, T), FINE, np.uint8)
    cls[:, 90:] = OFF
    cls[10:30, 10:40] = GEOMETRY                       # a block
    yy, xx = np.mgrid[:T, :T]
    ring = (np.hypot(yy - 60, xx - 60) < 18) & (np.hypot(yy - 60, xx - 60) > 11)
    cls[ring] = UNCOVERED                              # a ring: its label must sit on the ring
    cls[5:8, 70:73] = TEXTURE                          # 9 texels of 8640: just above 0.1 %, kept
    cls[80:82, 5:6] = TEXTURE                          # 2 texels: dropped (< 0.1 % of the surface)
    cls[40:44, 5:9] = GEOMETRY                         # a second, smaller block
    f = _fields(cls)
    got = errormap.find_regions(f, per_class=10)
    surface = float((cls != OFF).sum())
    want = []
    for code, kind in errormap.KINDS.items():
        # scikit-image's 8-connected labelling (connectivity=2) is the reference
        for p in regionprops(label(cls == code, connectivity=2)):
            if p.area / surface >= 0.001:
                want.append((kind, tuple(int(b) for b in p.bbox), p.area / surface))
    want.sort(key=lambda w: -w[2])
    assert [(r.kind, r.box) for r in got] == [(k, b) for k, b, _ in want]
    assert [r.share for r in got] == pytest.approx([s for _, _, s in want], rel=1e-12)
    assert got[0].kind == "uncovered"
    lead = errormap.find_regions(f, per_class=1, first="geometry")   # the verdict's class leads
    assert [r.kind for r in lead] == ["geometry", "uncovered", "texture"] and lead[0].box == (10, 10, 30, 40)
    blk = next(r for r in got if r.kind == "geometry")
    assert blk.score == pytest.approx(float(f.geometry[10:30, 10:40].mean()), rel=1e-6)
    for r in got:
        pr, pc = errormap.label_point(r.mask)
        assert r.mask[int(pr), int(pc)], f"label of region {r.kind} {r.box} lies outside it"


def test_classify_without_cls_follows_the_diagnosis_rule():
    cov = np.array([[0, 1, 2, 3, 4, 5]], np.float32)
    geo = np.array([[0.9, 0.9, 0.9, 0.2, 0.6, np.nan]], np.float32)
    tex = np.array([[0.9, 0.9, 0.9, 0.7, 0.8, 0.1]], np.float32)
    cls = errormap.classify(cov, geo, tex, np.ones((1, 6), bool), min_views=2)
    # featuretex.diagnose.classify.classify on the same input (without its small-region filter)
    from featuretex.diagnose.classify import classify as diagnosis_rule

    assert cls.tolist() == diagnosis_rule(np.ones((1, 6), bool), cov, geo, tex, min_views=2, min_region=1).tolist()
    assert cls.tolist() == [[UNCOVERED, UNCOVERED, GEOMETRY, TEXTURE, GEOMETRY, FINE]]


def _sphere_glb(path: Path, texture: Image.Image) -> trimesh.Trimesh:
    from featuretex import synth
    from featuretex.export.gltf import write_glb
    from featuretex.scene.mesh import load_mesh

    tm = synth.textured_sphere(0.4, texture, n_lat=24, n_lon=48, centre=(0.1, -0.2, 0.3))
    synth.write_mesh_obj(path.with_suffix(".obj"), tm)
    buf = io.BytesIO()
    texture.save(buf, format="PNG")
    write_glb(path, load_mesh(path.with_suffix(".obj"), "test"), buf.getvalue())
    return tm


def test_texel_areas_add_up_to_the_mesh_area(tmp_path):
    from featuretex import synth

    tm = _sphere_glb(tmp_path / "m.glb", synth.checker_texture(64, 4))
    lay = errormap.layout_from_model(tmp_path / "m.glb", 256)
    # trimesh's own triangle areas are the reference; texel sampling of the UV charts is exact
    # to about a texel along chart borders (here under 1 %)
    assert lay.area.sum() == pytest.approx(tm.area, rel=0.01)
    assert not lay.area[~lay.surface].any()


# ---------------------------------------------------------------------------------------------
# turntable
# ---------------------------------------------------------------------------------------------
def test_turntable_frames_match_an_independent_ray_caster(tmp_path):
    from featuretex import synth

    tex = synth.checker_texture(64, 4, colours=((240, 40, 30), (20, 60, 200)))
    tm = _sphere_glb(tmp_path / "m.glb", tex)
    model = turntable.load_model(tmp_path / "m.glb")
    size = 128
    centre, radius = turntable.bounding_sphere(model)
    assert centre == pytest.approx([0.1, -0.2, 0.3], abs=1e-6) and radius == pytest.approx(0.4, rel=1e-6)
    cams = turntable.orbit(centre, radius, np.array([0.0, 0.0, 1.0]), 4, front=np.array([1.0, 0, 0]))
    frames = turntable.render_frames(model, cams, size)
    caster = trimesh.ray.ray_triangle.RayMeshIntersector(tm)   # trimesh's pure-numpy caster, not Embree
    t = math.tan(cams.yfov / 2)
    j, i = np.meshgrid(np.arange(size) + 0.5, np.arange(size) + 0.5)
    # OpenGL perspective camera (gluPerspective): pixel centre -> direction in camera axes, -z forward
    d_cam = np.stack([(2 * j / size - 1) * t, (1 - 2 * i / size) * t, -np.ones_like(i)], -1).reshape(-1, 3)
    img = np.asarray(tex, np.uint8)
    for pose, frame in zip(cams.poses, frames):
        dirs = d_cam @ pose[:3, :3].T
        origins = np.broadcast_to(pose[:3, 3], dirs.shape)
        loc, ray, tri = caster.intersects_location(origins, dirs, multiple_hits=False)
        hit = np.zeros(size * size, bool)
        hit[ray] = True
        drawn = frame[..., 3].reshape(-1) >= 128
        iou = (hit & drawn).sum() / (hit | drawn).sum()
        assert iou > 0.95, iou        # only silhouette pixels (4x MSAA) may differ
        # unlit: the texture byte at the hit's uv (v up -> image row from the top), nearest texel
        bary = trimesh.triangles.points_to_barycentric(tm.triangles[tri], loc)
        uv = np.einsum("nk,nkd->nd", bary, tm.visual.uv[tm.faces[tri]])
        px = img[np.clip(((1 - uv[:, 1]) * 64).astype(int), 0, 63), np.clip((uv[:, 0] * 64).astype(int), 0, 63)]
        got = frame[..., :3].reshape(-1, 3)[ray]
        close = np.abs(got.astype(int) - px.astype(int)).max(axis=1) <= 40
        # measured 0.90 (misses only next to checker edges: mipmap filtering); a v flip scores 0.0
        assert close.mean() > 0.85, close.mean()


def test_animation_holds_every_frame(tmp_path):
    rng = np.random.default_rng(1)
    frames = [rng.integers(0, 256, (16, 16, 4), dtype=np.uint8) for _ in range(5)]
    for f in frames:
        f[..., 3] = 255
    turntable.write_animation(tmp_path / "t.png", frames)
    with Image.open(tmp_path / "t.png") as im:   # Pillow's APNG reader is the reference
        assert im.is_animated and im.n_frames == 5 and im.info.get("loop") == 0
        for k, f in enumerate(frames):
            im.seek(k)
            assert np.array_equal(np.asarray(im.convert("RGBA")), f)


# ---------------------------------------------------------------------------------------------
# curves
# ---------------------------------------------------------------------------------------------
def test_curves_plot_the_history():
    hist = {"step": [0, 10, 20, None], "loss": [0.5, 0.2, 0.1, 0.05], "heldout_psnr": [18.0, 21.0, float("nan"), 22.0],
            "train": {"step": [0, 5, 10, 15, 20], "loss": [0.6, 0.4, 0.25, 0.15, 0.1]}}
    fig = plots.loss_figure(hist)
    ax = fig.axes[0]
    data = {ln.get_label(): [list(map(float, a)) for a in ln.get_data()] for ln in ax.get_lines()}
    assert data["training loss"] == [[0, 5, 10, 15, 20], [0.6, 0.4, 0.25, 0.15, 0.1]]
    assert data["loss at evaluation"] == [[0, 10, 20], [0.5, 0.2, 0.1]]     # the None step is dropped
    assert ax.get_yscale() == "log"
    fig = plots.psnr_figure(hist, baseline_psnr=19.5)
    lines = {ln.get_label(): ln for ln in fig.axes[0].get_lines()}
    assert [list(map(float, a)) for a in lines["neural, held-out views"].get_data()] == [[0, 10], [18.0, 21.0]]
    assert list(map(float, lines["classical bake"].get_ydata())) == [19.5, 19.5]
    with Image.open(io.BytesIO(plots.figure_png(fig))) as im:
        assert im.format == "PNG" and im.width > 300
    assert plots.loss_figure({}) is None and plots.psnr_figure({"step": []}) is None


# ---------------------------------------------------------------------------------------------
# the page
# ---------------------------------------------------------------------------------------------
class _Page(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.images: list[dict] = []
        self.links: list[str] = []
        self.urls: list[str] = []
        self.ids: set[str] = set()
        self.text = ""

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.add(a["id"])
        if tag == "img":
            self.images.append(a)
        if tag == "a":
            self.links.append(a["href"])
        self.urls += [v for k, v in attrs if k in ("src", "href", "action", "poster", "data") and v]

    def handle_data(self, data):
        self.text += data


def _parse(path: Path) -> _Page:
    p = _Page()
    p.feed(path.read_text(encoding="utf-8"))
    return p


def _tree_hashes(folder: Path, skip: set[str]) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name not in skip}


def test_the_pipeline_writes_everything_the_report_reads(pipeline_run):
    """The report tests run on what the command really wrote: every file the report reads is there,
    with held-out renders and scores of every method and a fit history."""
    from featuretex.report.rundir import ARTEFACTS, METHODS

    assert [f for f in ARTEFACTS if not (pipeline_run / f).is_file()] == []
    summary = json.loads((pipeline_run / "summary.json").read_text())
    views = list(summary["heldout_per_view"]["baseline"])
    assert views
    for m in METHODS:
        assert summary["heldout"][m]["psnr"] is not None, m
        assert list(summary["heldout_per_view"][m]) == views, m
        for v in views:
            assert (pipeline_run / "heldout" / f"{v}_{m}.png").is_file(), (v, m)
    history = json.loads((pipeline_run / "fit" / "history.json").read_text())
    assert history["step"] and history["train"]["step"]
    assert summary["verdict"] in ("rescan", "fix-geometry", "refine-texture", "ready")


def test_report_is_self_contained_and_shows_the_summary(pipeline_run):
    before = _tree_hashes(pipeline_run, {"report.html", "turntable.png"})
    page_path = write_report(pipeline_run)
    assert page_path == pipeline_run / "report.html"
    assert _tree_hashes(pipeline_run, {"report.html", "turntable.png"}) == before      # inputs untouched
    assert not list(pipeline_run.glob(".report.html.*"))                              # atomic: no temp left
    page = _parse(page_path)
    summary = json.loads((pipeline_run / "summary.json").read_text())
    # nothing is fetched: images are data URIs, links are files beside the report
    for u in page.urls:
        assert not u.lower().startswith(("http:", "https:", "//", "ftp:")), u
    for img in page.images:
        assert img["src"].startswith("data:image/png;base64,"), img["src"][:40]
        with Image.open(io.BytesIO(base64.b64decode(img["src"].split(",", 1)[1]))) as im:
            im.load()
    for href in page.links:
        assert (pipeline_run / href).is_file(), href
    assert describe(summary["verdict"])[0] in page.text
    for reason in summary["reasons"]:
        assert reason in page.text
    for view, s in summary["heldout_per_view"]["baseline"].items():
        assert f"View {view}" in page.text
        assert f"PSNR {num(s['psnr'], 2, ' dB')}" in page.text and f"SSIM {num(s['ssim'], 3)}" in page.text
    with Image.open(pipeline_run / "turntable.png") as im:
        assert im.is_animated
    assert {"verdict", "heldout", "errormap", "turntable", "curves", "textures", "timings", "config"} <= page.ids
    assert "missing" not in page.ids                     # every artefact the report reads is there
    config = (pipeline_run / ".hydra" / "config.yaml").read_text()
    assert all(line.strip() in page.text for line in config.splitlines()[:5])   # the exact config is shown


def test_report_of_a_partial_run_names_what_is_missing(pipeline_run, tmp_path):
    import shutil

    run = tmp_path / "run"
    shutil.copytree(pipeline_run, run)
    gone = ["model.glb", "error_map.npz", "fit/history.json"]
    for f in gone:
        (run / f).unlink()
    summary = json.loads((run / "summary.json").read_text())
    summary.pop("verdict")
    (run / "summary.json").write_text(json.dumps(summary))
    page = _parse(write_report(run))
    assert "missing" in page.ids
    for f in gone:
        assert f in page.text
    assert describe(None)[0] in page.text                # "No verdict yet"
    assert "not produced: the export stage" in page.text  # no turntable without model.glb


def test_report_of_an_empty_folder_still_writes(tmp_path):
    page = _parse(write_report(tmp_path))
    assert describe(None)[0] in page.text and "summary.json" in page.text


def test_report_survives_odd_summary_values(tmp_path):
    (tmp_path / "summary.json").write_text(json.dumps({
        "verdict": "ready", "reasons": "not a list", "heldout": {"neural": "oops"}, "timings_s": [1, 2],
        "heldout_per_view": {"neural": {"v0": None}}, "areas": {"uncovered": "x"}}))
    page = _parse(write_report(tmp_path))
    assert describe("ready")[0] in page.text and "verdict" in page.ids
