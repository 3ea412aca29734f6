"""report.html rendered by headless Chromium from file://: every image loads, the verdict is
visible, no console errors, no content-security-policy violation, no request leaves the page, no
sideways scrolling on a phone-sized screen; the 3D view draws the model as pyrender draws the same
model.glb from the same camera, its surface switch changes the picture; the printed PDF's first
page is the summary (read back with pypdf).

Chromium is driven over the DevTools protocol on `--remote-debugging-pipe` (file descriptors 3 and
4, NUL-terminated JSON messages: Chrome DevTools Protocol documentation), stdlib only. WebGL runs
on SwiftShader, Chromium's CPU renderer. The screenshots are kept in test-artifacts/ for people to
look at.
"""

from __future__ import annotations

import base64
import io
import json
import math
import os
import select
import shutil
import subprocess
import tempfile
import time
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from featuretex.report.verdicts import describe
from test_report_fixtures import ARTIFACTS

# Debian's chromium-headless-shell renders like chromium and makes no background requests
BROWSER = shutil.which("chromium-headless-shell") or shutil.which("chromium")
FLAGS = ["--headless", "--no-sandbox", "--use-angle=swiftshader", "--enable-unsafe-swiftshader",
         "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-default-apps", "--mute-audio", "--remote-debugging-pipe"]

pytestmark = pytest.mark.skipif(BROWSER is None, reason="no chromium (apt-get install chromium)")


class Browser:
    """A headless Chromium with one page, spoken to over the DevTools pipe."""

    def __init__(self, profile: Path):
        to_child_r, self._w = os.pipe()
        self._r, from_child_w = os.pipe()

        def fds() -> None:  # the protocol pipe must sit on fds 3 (commands in) and 4 (replies out)
            a, b = os.dup(to_child_r), os.dup(from_child_w)   # above 4, so neither dup2 clobbers the other
            os.dup2(a, 3)
            os.dup2(b, 4)

        # pass_fds=(3, 4): subprocess closes every other descriptor after preexec_fn has run
        self.proc = subprocess.Popen([BROWSER, *FLAGS, f"--user-data-dir={profile}", "about:blank"],
                                     pass_fds=(3, 4), preexec_fn=fds,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        os.close(to_child_r)
        os.close(from_child_w)
        self._buf = b""
        self._id = 0
        self.events: list[dict] = []
        target = self.call("Target.createTarget", url="about:blank")["targetId"]
        self.session = self.call("Target.attachToTarget", targetId=target, flatten=True)["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            self.call(f"{domain}.enable", session=True)
        # record every content-security-policy violation the page reports (this script is the
        # browser's own, outside the page's policy)
        self.call("Page.addScriptToEvaluateOnNewDocument", session=True, source=CSP_WATCH)

    def _read(self, deadline: float) -> dict:
        while b"\0" not in self._buf:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([self._r], [], [], left)[0]:
                raise TimeoutError("no reply from chromium")
            chunk = os.read(self._r, 1 << 16)
            if not chunk:
                raise RuntimeError("chromium closed the DevTools pipe")
            self._buf += chunk
        msg, self._buf = self._buf.split(b"\0", 1)
        return json.loads(msg)

    def call(self, method: str, session: bool = False, timeout: float = 60.0, **params) -> dict:
        self._id += 1
        msg = {"id": self._id, "method": method, "params": params}
        if session:
            msg["sessionId"] = self.session
        os.write(self._w, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + timeout
        while True:
            reply = self._read(deadline)
            if reply.get("id") == self._id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_event(self, method: str, timeout: float = 60.0) -> dict:
        deadline = time.monotonic() + timeout
        for ev in self.events:
            if ev.get("method") == method:
                return ev
        while True:
            ev = self._read(deadline)
            self.events.append(ev)
            if ev.get("method") == method:
                return ev

    def evaluate(self, expression: str):
        r = self.call("Runtime.evaluate", session=True, expression=expression, returnByValue=True,
                      awaitPromise=True)
        if "exceptionDetails" in r:
            raise RuntimeError(f"page script failed: {r['exceptionDetails']}")
        return r["result"].get("value")

    def load(self, url: str, width: int, height: int, mobile: bool, scale: float) -> None:
        self.call("Emulation.setDeviceMetricsOverride", session=True, width=width, height=height,
                  deviceScaleFactor=scale, mobile=mobile)
        # from a blank page: a new address that differs only after '#' would not load the page again
        for address in ("about:blank", url):
            self.events = [e for e in self.events if e.get("method") != "Page.loadEventFired"]
            self.call("Page.navigate", session=True, url=address)
            self.wait_event("Page.loadEventFired")

    def screenshot(self, path: Path | None = None, clip: dict | None = None) -> np.ndarray:
        """A PNG of the whole page (or of `clip`, CSS pixels of the page), saved to `path`; its pixels."""
        whole = clip is None      # the whole page is laid out at full height; a clip is taken as shown
        clip = clip or {**self._page_size(), "x": 0, "y": 0}
        r = self.call("Page.captureScreenshot", session=True, format="png", captureBeyondViewport=whole,
                      clip={**clip, "scale": 1})
        data = base64.b64decode(r["data"])
        if path is not None:
            path.write_bytes(data)
        with Image.open(io.BytesIO(data)) as im:
            return np.asarray(im.convert("RGB"))

    def _page_size(self) -> dict:
        m = self.call("Page.getLayoutMetrics", session=True)["cssContentSize"]
        return {"width": m["width"], "height": m["height"]}

    def close(self) -> None:
        try:
            self.call("Browser.close", timeout=10)
        except Exception:
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
        os.close(self._w)
        os.close(self._r)


IMAGES_JS = """Promise.all(Array.from(document.images).map(i => i.decode().then(() => true, () => false)))
  .then(() => Array.from(document.images).map(i => ({alt: i.alt, ok: i.complete && i.naturalWidth > 0})))"""
VERDICT_JS = """(() => { const e = document.getElementById('verdict'); if (!e) return null;
  const r = e.getBoundingClientRect(), s = getComputedStyle(e);
  return {text: e.innerText, top: r.top, height: r.height, visible: s.visibility === 'visible' &&
          s.display !== 'none' && r.height > 0 && r.top < window.innerHeight}; })()"""
OVERFLOW_JS = "document.documentElement.scrollWidth - window.innerWidth"
CSP_WATCH = """window.__cspViolations = [];
document.addEventListener('securitypolicyviolation', e => window.__cspViolations.push(e.violatedDirective + ' ' + e.blockedURI));"""
READY_JS = """new Promise(done => { const t0 = performance.now(); (function poll() {
  const v = document.getElementById('viewer3d'); const s = v ? v.dataset.state : 'absent';
  if (s !== 'loading' || performance.now() - t0 > 60000) done(s); else setTimeout(poll, 50); })(); })"""
FRAMES_JS = "new Promise(done => requestAnimationFrame(() => requestAnimationFrame(() => done(true))))"
CANVAS_JS = """(() => { const c = document.querySelector('#viewer3d canvas'); c.scrollIntoView({block: 'center'});
  const r = c.getBoundingClientRect();
  return {x: r.x + window.scrollX, y: r.y + window.scrollY, width: r.width, height: r.height,
          pw: c.width, ph: c.height}; })()"""


def _problems(events: list[dict]) -> list[str]:
    out = []
    for e in events:
        m, p = e.get("method"), e.get("params", {})
        if m == "Runtime.exceptionThrown":
            out.append(f"exception: {p['exceptionDetails'].get('text')}")
        elif m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
            out.append(f"console.{p['type']}: {p.get('args')}")
        elif m == "Log.entryAdded" and p["entry"].get("level") == "error":
            out.append(f"log: {p['entry'].get('text')}")
        elif m == "Network.requestWillBeSent":
            url = p["request"]["url"]
            if not url.startswith(("file:", "data:", "about:", "blob:")):
                out.append(f"request left the page: {url[:80]}")
        elif m == "Network.loadingFailed":
            out.append(f"load failed: {p.get('errorText')}")
    return out


@pytest.fixture(scope="module")
def browser():
    with tempfile.TemporaryDirectory(prefix="featuretex-chromium-") as profile:
        b = Browser(Path(profile))
        try:
            yield b
        finally:
            b.close()


@pytest.fixture(scope="module")
def report(pipeline_run) -> Path:
    from featuretex.report import write_report

    return write_report(pipeline_run)


@pytest.mark.parametrize("layout", [("laptop", 1280, 900, False, 1.0), ("phone", 390, 844, True, 2.0)],
                         ids=["laptop", "phone"])
def test_report_renders_in_chromium(report, browser, layout):
    name, width, height, mobile, scale = layout
    browser.events.clear()
    browser.load(report.as_uri(), width, height, mobile, scale)
    images = browser.evaluate(IMAGES_JS)
    verdict = browser.evaluate(VERDICT_JS)
    overflow = browser.evaluate(OVERFLOW_JS)
    ARTIFACTS.mkdir(exist_ok=True)
    browser.screenshot(ARTIFACTS / f"report_{name}.png")

    # one image per held-out panel, the six views, the texture-space map and two fit curves
    assert len(images) >= 4 * 2 + 6 + 1 + 2
    assert [i["alt"] for i in images if not i["ok"]] == []
    assert browser.evaluate(READY_JS) == "ready"                 # the 3D view started from file://
    assert verdict is not None and verdict["visible"], verdict
    summary = json.loads((report.parent / "summary.json").read_text())
    assert describe(summary["verdict"])[0] in verdict["text"]
    assert overflow <= 1, f"{name}: page scrolls sideways by {overflow} px"
    assert browser.evaluate("window.__cspViolations") == []
    assert _problems(browser.events) == []


# ---------------------------------------------------------------------------------------------
# the 3D view
# ---------------------------------------------------------------------------------------------
def _look_at(eye: np.ndarray, target: np.ndarray) -> np.ndarray:
    """(4, 4) camera-to-world pose, OpenGL axes (looks down -z, +y up), world +Y up."""
    back = (eye - target) / np.linalg.norm(eye - target)
    right = np.cross([0.0, 1.0, 0.0], back)
    right /= np.linalg.norm(right)
    pose = np.eye(4)
    pose[:3, 0], pose[:3, 1], pose[:3, 2], pose[:3, 3] = right, np.cross(back, right), back, eye
    return pose


def _pyrender_unlit(glb: Path, pose: np.ndarray, yfov_deg: float, width: int, height: int) -> tuple[np.ndarray, np.ndarray]:
    """model.glb as pyrender draws it (its own glTF loading through trimesh, FLAT shading: the
    base-colour texture as stored, nearest texel): (H, W, 3) uint8 colour and (H, W) bool coverage."""
    import pyrender
    import trimesh

    model = trimesh.load(str(glb), force="scene")
    scene = pyrender.Scene(bg_color=[0.0, 0.0, 0.0, 0.0], ambient_light=[1.0, 1.0, 1.0])
    nearest = pyrender.Sampler(magFilter=9728, minFilter=9728)        # GL_NEAREST
    for node in model.graph.nodes_geometry:
        transform, name = model.graph[node]
        mesh = pyrender.Mesh.from_trimesh(model.geometry[name], smooth=False)
        for prim in mesh.primitives:
            prim.material.baseColorTexture.sampler = nearest
        scene.add(mesh, pose=transform)
    scene.add(pyrender.PerspectiveCamera(yfov=math.radians(yfov_deg), aspectRatio=width / height, znear=0.01,
                                         zfar=100.0), pose=pose)
    r = pyrender.OffscreenRenderer(width, height)
    try:
        colour, depth = r.render(scene, flags=pyrender.RenderFlags.FLAT)
    finally:
        r.delete()
    return np.asarray(colour)[..., :3], depth > 0


def _psnr(a: np.ndarray, b: np.ndarray, mask: np.ndarray) -> float:
    mse = np.mean((a[mask].astype(np.float64) - b[mask].astype(np.float64)) ** 2)
    return 10 * math.log10(255.0 ** 2 / max(mse, 1e-12))


def test_3d_view_draws_the_model_as_pyrender_does(report, browser):
    from scipy import ndimage

    from featuretex.report.stills import load_model

    model = load_model(report.parent / "model.glb")
    c, r = model.centre, model.radius
    eye = c + np.array([0.45, 0.35, 0.82]) / np.linalg.norm([0.45, 0.35, 0.82]) * r * 4.2
    fov = 30.0
    cam = ",".join(f"{v:.6f}" for v in [*eye, *c, fov])
    browser.events.clear()
    browser.load(f"{report.as_uri()}#camera={cam}&shade=unlit&filter=nearest", 1280, 900, False, 1.0)
    assert browser.evaluate(READY_JS) == "ready"
    box = browser.evaluate(CANVAS_JS)
    browser.evaluate(FRAMES_JS)
    assert (box["pw"], box["ph"]) == (round(box["width"]), round(box["height"]))   # one pixel per CSS pixel
    clip = {k: box[k] for k in ("x", "y", "width", "height")}
    shot = browser.screenshot(ARTIFACTS / "viewer_unlit.png", clip)
    browser.evaluate("document.querySelector('#viewer3d canvas').style.visibility = 'hidden'")
    blank = browser.screenshot(None, clip)                  # the same place without the canvas
    want, on = _pyrender_unlit(report.parent / "model.glb", _look_at(eye, c), fov, shot.shape[1], shot.shape[0])
    Image.fromarray(want).save(ARTIFACTS / "viewer_unlit_pyrender.png")
    inside = ndimage.binary_erosion(on, iterations=2)       # silhouettes: antialiasing differs
    assert inside.sum() > 0.05 * inside.size                # the model fills a good part of the view
    drawn = np.abs(shot.astype(int) - blank.astype(int)).max(axis=-1) > 0
    assert drawn[inside].mean() > 0.5                       # the canvas shows the model where pyrender does
    assert drawn[~ndimage.binary_dilation(on, iterations=3)].mean() < 0.001   # and nothing elsewhere
    assert _psnr(shot, want, inside) >= 30.0                # measured 43.5 dB on this scene
    assert _problems(browser.events) == []


def test_3d_view_switches_surface_and_shading(report, browser):
    browser.events.clear()
    browser.load(report.as_uri(), 1280, 900, False, 1.0)
    assert browser.evaluate(READY_JS) == "ready"
    box = browser.evaluate(CANVAS_JS)
    clip = {k: box[k] for k in ("x", "y", "width", "height")}

    def shot(click: str | None, name: str) -> np.ndarray:
        if click:
            browser.evaluate(f"document.querySelector('#viewer3d button[{click}]').click()")
        browser.evaluate(FRAMES_JS)
        return browser.screenshot(ARTIFACTS / f"viewer_{name}.png", clip).astype(int)

    lit = shot(None, "lit")
    errors = shot('data-mode="errors"', "errors")
    pins = browser.evaluate("!document.querySelector('#viewer3d .vw-pins').hidden")
    unlit = shot('data-shade="unlit"', "errors_unlit")
    classical = shot('data-mode="classical"', "classical_unlit")
    changed = lambda a, b: (np.abs(a - b).max(axis=-1) > 12).mean()  # noqa: E731
    assert changed(lit, errors) > 0.02          # the error map's colours replace the texture
    assert changed(errors, unlit) > 0.02        # shading on and off
    assert changed(unlit, classical) > 0.02     # another texture
    assert pins                                 # region numbers show with the error map
    assert browser.evaluate("document.querySelector('#viewer3d .vw-pins').hidden")   # and only with it
    assert _problems(browser.events) == [] and browser.evaluate("window.__cspViolations") == []


# ---------------------------------------------------------------------------------------------
# print
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("paper", [("A4", 8.27, 11.69), ("Letter", 8.5, 11.0)], ids=["A4", "Letter"])
def test_first_printed_page_is_the_summary(report, browser, paper):
    from pypdf import PdfReader

    name, w, h = paper
    browser.load(report.as_uri(), 1280, 900, False, 1.0)
    r = browser.call("Page.printToPDF", session=True, paperWidth=w, paperHeight=h, printBackground=True,
                     timeout=120)
    pdf = base64.b64decode(r["data"])
    ARTIFACTS.mkdir(exist_ok=True)
    (ARTIFACTS / f"report_{name}.pdf").write_bytes(pdf)
    pages = PdfReader(io.BytesIO(pdf)).pages
    first = " ".join(pages[0].extract_text().split())
    summary = json.loads((report.parent / "summary.json").read_text())
    assert describe(summary["verdict"])[0] in first
    for heading in ("What the client gets", "How close to the photos", "Look closer", "Where on the object"):
        assert heading in first, heading
    sizes = [im.image.size for im in pages[0].images]
    assert sizes.count((320, 320)) == 6, sizes                 # the six views of the error map
    crops = [w for w, h in sizes if w == h and w not in (320, 20)]
    assert len(crops) >= 3 and len(set(crops)) == 1, sizes     # photo, classical, delivered of one detail
    assert len(pages) >= 2 and "Problem regions" in " ".join(pages[1].extract_text().split())


# ---------------------------------------------------------------------------------------------
# the batch index
# ---------------------------------------------------------------------------------------------
ROWS_JS = "Array.from(document.querySelectorAll('table.sortable tbody tr')).map(r => r.cells[1].innerText.split('\\n')[0])"


def test_batch_index_sorts_by_any_column(tmp_path, browser):
    """batch.html from three fabricated job folders (invented figures, ordering only): a still of
    each model, and rows that re-sort when a heading is clicked."""
    import yaml

    from featuretex import batch

    figures = {"jug_a": ("ready", 24.0), "jug_b": ("rescan", 18.0), "jug_c": ("fix-geometry", 21.0)}
    for k, (name, (verdict, psnr)) in enumerate(figures.items()):
        job = tmp_path / str(k)
        (job / ".hydra").mkdir(parents=True)
        (job / ".hydra" / "overrides.yaml").write_text(yaml.safe_dump([f"scan={name}"]))
        (job / "summary.json").write_text(json.dumps({
            "scene": f"/scans/{name}/scene.yaml", "verdict": verdict, "timings_s": {"total": 10.0 + k},
            "heldout": {m: {"psnr": psnr + d} for m, d in (("baseline", 0.0), ("baked", 1.0), ("neural", 1.5))}}))
        (job / "report.html").write_text("<!doctype html><title>r</title>")
        Image.new("RGB", (240, 240), (40 * k, 90, 160)).save(job / "preview.png")
    _, page = batch.write_batch_index(tmp_path)
    browser.events.clear()
    browser.load(page.as_uri(), 1280, 900, False, 1.0)
    assert browser.evaluate(ROWS_JS) == ["jug_b", "jug_c", "jug_a"]          # most work first
    images = browser.evaluate(IMAGES_JS)
    assert len(images) == 3 and all(i["ok"] for i in images)

    def click(heading: str) -> list[str]:
        browser.evaluate("Array.from(document.querySelectorAll('thead th')).find(th => th.innerText.trim() === "
                         f"'{heading}').querySelector('button').click()")
        return browser.evaluate(ROWS_JS)

    assert click("classical dB") == ["jug_b", "jug_c", "jug_a"]              # 18, 21, 24
    assert click("classical dB") == ["jug_a", "jug_c", "jug_b"]              # again: reversed
    assert click("scan") == ["jug_a", "jug_b", "jug_c"]
    assert click("time") == ["jug_a", "jug_b", "jug_c"]
    browser.screenshot(ARTIFACTS / "batch.png")
    assert _problems(browser.events) == [] and browser.evaluate("window.__cspViolations") == []
