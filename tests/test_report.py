"""The per-run report and its parts: regions against scikit-image, texel areas against trimesh,
stills of the model against trimesh's own (non-Embree) ray caster, details against a brute-force
window mean, the page's legend against the pictures' legends (OpenCV template matching), curves
against matplotlib's artists, and the page itself: self-contained, every number from
summary.json, missing parts named."""

from __future__ import annotations

import base64
import hashlib
import io
import json
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import trimesh
from PIL import Image

from featuretex.diagnose.classify import FINE, GEOMETRY, OFF, TEXTURE, UNCOVERED
from featuretex.report import errormap, plots
from featuretex.report.html import write_report
from featuretex.report.inline import num
from featuretex.report.verdicts import describe


# ---------------------------------------------------------------------------------------------
# error-map regions: numbered by the diagnosis, read (not found again) by the report
# ---------------------------------------------------------------------------------------------
def _classes() -> np.ndarray:
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
    return cls


def _numbered(cls: np.ndarray, verdict: str = "ready"):
    from featuretex.diagnose.numbered import number_regions

    T = cls.shape[0]
    yy, xx = np.mgrid[:T, :T]
    pos = np.stack([xx, yy, np.zeros_like(xx)], -1).astype(np.float32)   # a texel's position = its (col, row)
    return number_regions(cls, (cls != OFF).astype(np.float64), pos, np.zeros(cls.shape, bool),
                          np.full(cls.shape, np.nan, np.float32), verdict, per_class=10)


def test_numbered_regions_match_scikit_image_regionprops():
    from skimage.measure import label, regionprops

    cls = _classes()
    got = _numbered(cls)
    surface = float((cls != OFF).sum())
    want = []
    # scikit-image's 8-connected labelling (connectivity=2) is the reference; within a class the
    # largest come first, classes in the order geometry, texture, uncovered
    for code in (GEOMETRY, TEXTURE, UNCOVERED):
        props = [p for p in regionprops(label(cls == code, connectivity=2)) if p.area / surface >= 0.001]
        want += [(code, tuple(int(b) for b in p.bbox), p.area / surface) for p in sorted(props, key=lambda p: -p.area)]
    boxes = []
    for r in got:
        rows, cols = np.nonzero(r.mask)
        boxes.append((r.code, (rows.min(), cols.min(), rows.max() + 1, cols.max() + 1)))
    assert boxes == [(c, b) for c, b, _ in want]
    assert [r.share for r in got] == pytest.approx([s for _, _, s in want], rel=1e-12)
    assert [r.number for r in got] == list(range(1, len(got) + 1))
    lead = _numbered(cls, "rescan")                    # the verdict's class leads
    assert lead[0].code == UNCOVERED
    for r in got:                                      # the marker is a texel of the region, even on the ring
        col, row = int(r.marker[0]), int(r.marker[1])
        assert r.mask[row, col], f"marker of region {r.number} lies outside it"


def test_report_regions_are_the_diagnosis_regions(tmp_path):
    """The report reads error_map.npz's `region` and summary.json's `regions`: same numbers, same
    texels, same figures."""
    from featuretex.diagnose.numbered import label_map

    cls = _classes()
    got = _numbered(cls)
    entries = [{"number": r.number, "class": r.name, "share": r.share, "area": r.area,
                "centre": list(map(float, r.centre)), "marker": list(map(float, r.marker)), "offset": None,
                "payoff_db": {"geometry": 0.5 * r.number, "texture": 0.1}} for r in got]
    T = cls.shape[0]
    np.savez(tmp_path / "error_map.npz", cls=cls, geometry=np.zeros((T, T), np.float32),
             texture=np.zeros((T, T), np.float32), region=label_map(got, cls.shape).astype(np.float32))
    fields = errormap.load_fields(tmp_path / "error_map.npz")
    regions = errormap.regions_of(entries, fields.region)
    assert [r.number for r in regions] == [r.number for r in got]
    for mine, theirs in zip(regions, got):
        full = np.zeros(cls.shape, bool)
        full[mine.box[0]:mine.box[2], mine.box[1]:mine.box[3]] = mine.mask
        assert np.array_equal(full, theirs.mask)
        assert mine.kind == theirs.name and mine.share == theirs.share and mine.payoff["geometry"] == 0.5 * mine.number
    np.savez(tmp_path / "old.npz", cls=cls, geometry=np.zeros((T, T), np.float32), texture=np.zeros((T, T), np.float32))
    with pytest.raises(KeyError, match="region"):       # an older run's npz: said, not guessed
        errormap.load_fields(tmp_path / "old.npz")


def _sphere_glb(path: Path, texture: Image.Image, frame: np.ndarray | None = None) -> trimesh.Trimesh:
    """A textured sphere (scene frame) written as model.glb with `frame` as its scene -> glTF matrix."""
    from featuretex import synth
    from featuretex.export.gltf import write_glb
    from featuretex.scene.mesh import load_mesh

    tm = synth.textured_sphere(0.4, texture, n_lat=24, n_lon=48, centre=(0.1, -0.2, 0.3))
    synth.write_mesh_obj(path.with_suffix(".obj"), tm)
    buf = io.BytesIO()
    texture.save(buf, format="PNG")
    write_glb(path, load_mesh(path.with_suffix(".obj"), "test"), buf.getvalue(), gltf_from_scene=frame)
    return tm


def test_texel_areas_add_up_to_the_mesh_area(tmp_path):
    from featuretex import synth
    from featuretex.diagnose.grid import texel_areas
    from featuretex.export.gltf import read_glb_mesh
    from featuretex.raster.uvspace import rasterise_uv

    tm = _sphere_glb(tmp_path / "m.glb", synth.checker_texture(64, 4))
    mesh = read_glb_mesh(tmp_path / "m.glb")[0]
    texels = rasterise_uv(mesh, 256)
    area = texel_areas(mesh, texels)
    # trimesh's own triangle areas are the reference; texel sampling of the UV charts is exact
    # to about a texel along chart borders (here under 1 %)
    assert area.sum() == pytest.approx(tm.area, rel=0.01)
    assert not area[~texels.valid].any()


# ---------------------------------------------------------------------------------------------
# stills of the model, the error map on it, details to look closer at
# ---------------------------------------------------------------------------------------------
# a frame that is not the identity: scene z up -> glTF +Y up, centimetres -> metres, shifted
FRAME = np.array([[0.01, 0, 0, 0.05], [0, 0, 0.01, -0.02], [0, -0.01, 0, 0.03], [0, 0, 0, 1.0]])


def test_stills_match_an_independent_ray_caster(tmp_path):
    from featuretex import synth
    from featuretex.report import stills

    tex = synth.checker_texture(64, 4, colours=((240, 40, 30), (20, 60, 200)))
    tm = _sphere_glb(tmp_path / "m.glb", tex, frame=FRAME)
    model = stills.load_model(tmp_path / "m.glb")
    world = trimesh.Trimesh(trimesh.transform_points(tm.vertices, FRAME), tm.faces, process=False)
    assert model.centre == pytest.approx(world.bounds.mean(axis=0), abs=1e-9)
    caster = trimesh.ray.ray_triangle.RayMeshIntersector(world)   # trimesh's pure-numpy caster, not Embree
    size, img = 48, np.asarray(tex, np.uint8)
    for name, towards, up in stills.SIX_VIEWS:
        cast = stills.Caster(model).cast(towards, up, size, half=model.half)
        # the same orthographic rays, built here from the definition: a (2 size)^2 grid over the
        # bounding box's longest side (x 1.04), looking from `towards`, `up` at the top of the picture
        back = np.asarray(towards, float)
        right = np.cross(up, back)
        n, half = 2 * size, 1.04 * np.abs(world.vertices - model.centre).max()
        t = ((np.arange(n) + 0.5) / n * 2 - 1) * half
        x, y = np.meshgrid(t, -t)
        origins = (model.centre + x[..., None] * right + y[..., None] * np.asarray(up, float)
                   + 2 * model.radius * back).reshape(-1, 3)
        loc, ray, tri = caster.intersects_location(origins, np.broadcast_to(-back, origins.shape), multiple_hits=False)
        hit = np.zeros(n * n, bool)
        hit[ray] = True
        ours = cast.tri.reshape(-1) >= 0
        assert (hit & ours).sum() / (hit | ours).sum() > 0.99, name       # only grazing rays may differ
        both = ours[ray]
        bary = trimesh.triangles.points_to_barycentric(world.triangles[tri], loc)
        uv = np.einsum("nk,nkd->nd", bary, tm.visual.uv[tm.faces[tri]])
        want = img[np.clip(((1 - uv[:, 1]) * 64).astype(int), 0, 63), np.clip((uv[:, 0] * 64).astype(int), 0, 63)]
        r, c = stills.texel_at(cast.uv.reshape(-1, 2)[ray], 64)
        # nearest texel of the same texture at the same UV (checker edges may fall either side)
        assert (img[r, c] == want).all(axis=1)[both].mean() > 0.97, name


def test_error_views_mark_each_region_where_it_faces(tmp_path):
    from featuretex import synth
    from featuretex.report import errorviews, stills

    tm = _sphere_glb(tmp_path / "m.glb", synth.checker_texture(64, 4), frame=FRAME)
    model = stills.load_model(tmp_path / "m.glb")
    # three regions in texture space, each around the texel the sphere shows towards +X, -Z, +Y
    ids = np.zeros((64, 64), np.int32)
    want = {}
    for n, axis in ((1, [1, 0, 0]), (2, [0, 0, -1]), (3, [0, 1, 0])):
        centre = np.linalg.inv(FRAME[:3, :3]) @ np.asarray(axis, float)
        k = int(np.argmax(((tm.vertices - tm.vertices.mean(0)) / 0.4) @ (centre / np.linalg.norm(centre))))
        u, v = tm.visual.uv[k]
        r, c = int((1 - v) * 64), int(u * 64)
        ids[max(r - 3, 0):r + 3, max(c - 3, 0):c + 3] = n
        want[n] = [name for name, towards, _ in stills.SIX_VIEWS if list(towards) == [float(a) for a in axis]][0]
    views = errorviews.render(stills.Caster(model), np.full((64, 64, 3), 200, np.uint8), ids, size=96)
    assert {n: views.names[i] for n, i in views.shown_in.items()} == want
    grid = errorviews.sheet(views)
    assert grid.shape[1] == 3 * 96 + 4 * 8


def test_details_are_where_the_textures_differ_and_never_read_the_photo(tmp_path):
    from featuretex.report import closer

    rng = np.random.default_rng(3)
    base = np.full((240, 320, 3), 120, np.uint8)
    base[20:220, 30:300] = rng.integers(60, 200, (200, 270, 3))          # the object
    after = base.copy()
    after[100:140, 200:240] = 255 - after[100:140, 200:240]              # a detail that changed
    for name, im in (("a_baseline", base), ("a_baked", after), ("b_baseline", base), ("b_baked", base)):
        Image.fromarray(im).save(tmp_path / f"{name}.png")
    renders = {v: (tmp_path / f"{v}_baseline.png", tmp_path / f"{v}_baked.png") for v in ("a", "b")}
    found = closer.choose(renders, count=3, crop=64)
    assert [d.view for d in found] == ["a"]                  # one detail per view without a locator
    x0, y0, x1, y1 = found[0].box
    assert x0 <= 200 and x1 >= 240 and y0 <= 100 and y1 >= 140 and x1 - x0 == 64
    # a brute-force mean over every window (numpy) is the reference for the winning score
    e = closer.detail_energy(*(closer.read_rgb(p) for p in renders["a"]))
    assert found[0].score == pytest.approx(float(e[y0:y1, x0:x1].mean()), rel=1e-6)
    # several places of one view: non-overlapping windows, best first
    more = closer.windows(e, np.ones(e.shape, bool), 64, 3)
    boxes = [b for b, _ in more]
    assert boxes[0] == found[0].box and all(
        a[2] <= b[0] or b[2] <= a[0] or a[3] <= b[1] or b[3] <= a[1] for i, a in enumerate(boxes) for b in boxes[i + 1:])


def test_legend_in_the_page_matches_the_pictures(pipeline_run):
    """Every swatch of the page's legend appears in the legends drawn into error_map.png and
    error_map_views.png, pixel for pixel and in the same order (OpenCV template matching)."""
    import cv2

    from featuretex.diagnose.palette import LEGEND, NOTE

    page = _parse(write_report(pipeline_run))
    legend = [im for im in page.images if "key" in im.get("class", "").split()]   # the full legend's swatches
    assert [int(s["data-class"]) for s in legend] == [c for c, _, _ in LEGEND]
    assert NOTE in page.text and all(label in page.text and meaning in page.text for _, label, meaning in LEGEND)
    for png in ("error_map.png", "error_map_views.png"):
        picture = cv2.cvtColor(cv2.imread(str(pipeline_run / png)), cv2.COLOR_BGR2RGB)
        strip = picture[picture.shape[0] // 2:]                   # the legend lies below the picture
        spots = []
        for s in legend:
            sw = np.asarray(Image.open(io.BytesIO(base64.b64decode(s["src"].split(",", 1)[1]))).convert("RGB"))
            score = cv2.matchTemplate(strip, sw, cv2.TM_SQDIFF)
            _, _, (x, y), _ = cv2.minMaxLoc(score)
            assert score[y, x] < 1.0, (png, s["alt"])           # the same pixels (float rounding only)
            spots.append((x, y))
        columns = sorted({x for x, _ in spots})
        reading = sorted(range(len(spots)), key=lambda k: (columns.index(spots[k][0]), spots[k][1]))
        assert reading == list(range(len(spots))), png            # in the same order (down each column)


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
        self.scripts: list[tuple[dict, str]] = []     # (attributes, text) of every <script>
        self.csp = ""
        self._script: dict | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.add(a["id"])
        if tag == "script":
            self._script = a
            self.scripts.append((a, ""))
        if tag == "meta" and a.get("http-equiv", "").lower() == "content-security-policy":
            self.csp = a["content"]
        if tag == "img":
            self.images.append(a)
        if tag == "a":
            self.links.append(a["href"])
        self.urls += [v for k, v in attrs if k in ("src", "href", "action", "poster", "data") and v]

    def handle_endtag(self, tag):
        if tag == "script":
            self._script = None

    def handle_data(self, data):
        if self._script is not None:
            attrs, text = self.scripts[-1]
            self.scripts[-1] = (attrs, text + data)
            return
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
    outputs = {"report.html", "error_map_views.png", "preview.png"}
    before = _tree_hashes(pipeline_run, outputs)
    page_path = write_report(pipeline_run)
    assert page_path == pipeline_run / "report.html"
    assert _tree_hashes(pipeline_run, outputs) == before                              # inputs untouched
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
    # scripts: all inline, each allowed by its SHA-256 in the policy (CSP Level 3 hash sources),
    # nothing else allowed; data blocks (application/json) are never run
    policy = dict(d.strip().split(" ", 1) for d in page.csp.split(";") if d.strip())
    run = [text for attrs, text in page.scripts if attrs.get("type", "text/javascript") == "text/javascript"]
    assert all("src" not in attrs for attrs, _ in page.scripts)
    hashes = {"'sha256-" + base64.b64encode(hashlib.sha256(t.encode()).digest()).decode() + "'" for t in run}
    assert set(policy["script-src"].split()) == hashes and len(run) >= 3    # three.js, the viewer, the sliders
    assert policy["default-src"] == "'none'"
    # the model inside the page is model.glb, byte for byte
    data = next(json.loads(t) for a, t in page.scripts if a.get("id") == "viewer3d-data")
    assert base64.b64decode(data["glb"]) == (pipeline_run / "model.glb").read_bytes()
    assert describe(summary["verdict"])[0] in page.text
    for reason in summary["reasons"]:
        assert reason in page.text
    for view, s in summary["heldout_per_view"]["baseline"].items():
        assert f"View {view}" in page.text
        assert f"PSNR {num(s['psnr'], 2, ' dB')}" in page.text and f"SSIM {num(s['ssim'], 3)}" in page.text
    assert num(summary["heldout"]["baked"]["psnr_tolerant"], 2) in page.text
    with Image.open(pipeline_run / "error_map_views.png") as im, Image.open(pipeline_run / "preview.png") as pre:
        assert im.width > 3 * 320 and pre.size == (240, 240)
    assert {"verdict", "deliverables", "quality", "view3d", "closer", "where", "errormap", "heldout", "curves",
            "textures", "timings", "config"} <= page.ids
    assert "missing" not in page.ids                     # every artefact the report reads is there
    from featuretex.report.html import page_bytes

    text = page_path.read_text(encoding="utf-8")
    parts = page_bytes(text)                             # the budget's breakdown accounts for every byte
    assert sum(parts.values()) == len(text.encode()) and parts["rest"] < 0.01 * len(text.encode())
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
    assert "no 3D view: the export stage has not written model.glb" in page.text


def test_report_of_an_empty_folder_still_writes(tmp_path):
    page = _parse(write_report(tmp_path))
    assert describe(None)[0] in page.text and "summary.json" in page.text


def test_report_survives_odd_summary_values(tmp_path):
    (tmp_path / "summary.json").write_text(json.dumps({
        "verdict": "ready", "reasons": "not a list", "heldout": {"neural": "oops"}, "timings_s": [1, 2],
        "heldout_per_view": {"neural": {"v0": None}}, "areas": {"uncovered": "x"}}))
    page = _parse(write_report(tmp_path))
    assert describe("ready")[0] in page.text and "verdict" in page.ids


def test_report_shows_what_later_stages_add(pipeline_run, tmp_path):
    """summary.json keys other stages write (inferred, warnings, another scored method) appear
    without the report knowing them in advance; the numbered regions are the diagnosis's own, with
    its payoff estimates, in the table and as pins on the 3D model."""
    import shutil

    run = tmp_path / "run"
    shutil.copytree(pipeline_run, run)
    summary = json.loads((run / "summary.json").read_text())
    summary["inferred"] = [{"what": "up direction", "detail": "from the camera ring (+z)"}]
    summary["warnings"] = ["photo v003 is blurred"]
    summary["heldout"]["touchup"] = {"psnr": 31.25, "ssim": 0.5, "psnr_gaincomp": 31.5, "psnr_tolerant": 33.75}
    (run / "summary.json").write_text(json.dumps(summary))
    page = _parse(write_report(run))
    for text in ("up direction", "from the camera ring (+z)", "photo v003 is blurred", "Touched-up model", "33.75"):
        assert text in page.text, text
    data = next(json.loads(t) for a, t in page.scripts if a.get("id") == "viewer3d-data")
    regions = [r for r in summary.get("regions") or [] if r["class"] in ("geometry", "texture", "uncovered")]
    assert regions, "the tiny scene's run numbers at least one region"
    assert [p["n"] for p in data["regions"]] == [r["number"] for r in regions]
    for r in regions:
        if r["class"] != "uncovered":
            assert f"{round(r['payoff_db']['geometry'], 2) + 0.0:+.2f} dB" in page.text


def test_details_are_located_on_the_surface_the_held_out_render_shows(pipeline_run):
    """The locator behind "Look closer" (the run's working camera, a ray into model.glb) finds, for a
    pixel of a held-out render, the surface point whose texel that render shows there: the classical
    texture at the UV of the point trimesh's proximity query finds (an independent closest-point
    search) matches the rendered pixel."""
    from featuretex.report import closer
    from featuretex.report.context import Page
    from featuretex.report.rundir import read_run_dir
    from featuretex.texels.sampling import sample_texture

    page = Page(read_run_dir(pipeline_run))
    locate = closer.locator(page.scene_views, page.caster)
    mesh = page.model.mesh
    tm = trimesh.Trimesh(mesh.vertices, mesh.faces, process=False)
    tex = np.asarray(Image.open(pipeline_run / "baseline_texture.png").convert("RGB"), np.float32)
    view = page.run.heldout_views[0]
    render = np.asarray(Image.open(pipeline_run / "heldout" / f"{view}_baseline.png").convert("RGB"), np.float32)
    ys, xs = np.nonzero(render.max(axis=-1) > 0)
    pick = np.random.default_rng(0).choice(len(xs), 200, replace=False)
    pts, want = [], []
    for i in pick:
        p = locate(view, float(xs[i]), float(ys[i]))
        if p is not None:
            pts.append(p)
            want.append(render[ys[i], xs[i]])
    assert len(pts) > 180
    closest, _, tri = trimesh.proximity.closest_point(tm, np.array(pts))
    bary = trimesh.triangles.points_to_barycentric(tm.triangles[tri], closest)
    uv = np.einsum("nk,nkd->nd", bary, mesh.uv[mesh.faces[tri]])
    got = sample_texture(tex, uv.astype(np.float32))
    close = np.abs(got - np.array(want)).max(axis=1) <= 12
    assert close.mean() > 0.9, close.mean()       # texel edges and silhouettes may differ
