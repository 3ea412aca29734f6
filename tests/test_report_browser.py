"""report.html rendered by headless Chromium: every image loads, the verdict is visible, no console
errors, no request leaves the page, no sideways scrolling on a phone-sized screen.

Chromium is driven over the DevTools protocol on `--remote-debugging-pipe` (file descriptors 3 and
4, NUL-terminated JSON messages: Chrome DevTools Protocol documentation), stdlib only. The
screenshots are kept in test-artifacts/ for people to look at.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import tempfile
import time
from pathlib import Path

import pytest

from featuretex.report.verdicts import describe
from test_report_fixtures import ARTIFACTS

# Debian's chromium-headless-shell renders like chromium and makes no background requests (DESIGN §7)
BROWSER = shutil.which("chromium-headless-shell") or shutil.which("chromium")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
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

    def _read(self, deadline: float) -> dict:
        while b"\0" not in self._buf:
            if time.monotonic() > deadline:
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
        self.events = [e for e in self.events if e.get("method") != "Page.loadEventFired"]
        self.call("Page.navigate", session=True, url=url)
        self.wait_event("Page.loadEventFired")

    def screenshot(self, path: Path) -> None:
        import base64

        r = self.call("Page.captureScreenshot", session=True, format="png", captureBeyondViewport=True,
                      clip={**self._page_size(), "x": 0, "y": 0, "scale": 1})
        path.write_bytes(base64.b64decode(r["data"]))

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
            if not url.startswith(("file:", "data:", "about:")):
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

    # the page has one image per held-out panel, the error map, the turntable, its stills and 2 curves
    assert len(images) >= 4 * 2 + 1 + 1 + 6 + 2
    assert [i["alt"] for i in images if not i["ok"]] == []
    assert verdict is not None and verdict["visible"], verdict
    summary = json.loads((report.parent / "summary.json").read_text())
    assert describe(summary["verdict"])[0] in verdict["text"]
    assert overflow <= 1, f"{name}: page scrolls sideways by {overflow} px"
    assert _problems(browser.events) == []
