"""report.html: one self-contained page per run (images inlined as data URIs, scripts inline and
allowed by hash, no external requests), and the page's later sections.

Order of the page: verdict and reasons; warnings and what the run assumed; what the client gets;
how close to the held-out photos; the model in 3D; details to look closer at; the error map on
the object; the geometry touch-up (when run); problem regions and the map in texture
space; held-out views side by side; fit curves; textures; timings; exact config; what this run
did not produce. Each section
shows what exists and says plainly what is missing. Printed, the first page is the summary
(sections marked p1) and the rest follows.
"""

from __future__ import annotations

import logging
import math
import re
import time
from pathlib import Path
from typing import Any, Callable

from featuretex.atomic import write_bytes, write_text
from featuretex.report import plots, scripts
from featuretex.report.compare import closer_html
from featuretex.report.context import PREVIEW_FILE, Page
from featuretex.report.errorsection import uvmap_html, where_html
from featuretex.report.headline import deliverables_html, method_label, quality_html, verdict_html
from featuretex.report.inline import absent, data_uri, esc, file_uri, image_png, num, seconds, thumbnail_uri
from featuretex.report.rundir import ARTEFACTS, RunDir, read_run_dir
from featuretex.report.style import CSS
from featuretex.report.touchup import touchup_html
from featuretex.report.verdicts import describe
from featuretex.report.viewer import viewer_html

log = logging.getLogger("featuretex")

TEXTURE_THUMB_PX = 512
# modules of featuretex.report whose `section_html(run: RunDir) -> str` adds a section after the
# error map when the module exists (a stage that is not part of every install)
# ---------------------------------------------------------------------------------------------
# sections
# ---------------------------------------------------------------------------------------------
def _stage_of(rel: str) -> str:
    return ARTEFACTS.get(rel, ("?", ""))[0]


def scan_title(run: RunDir) -> str:
    """The scan's name: the last two folders of its scene ("shoot/vase03"), else the run folder."""
    scene = run.summary.get("scene")
    if not scene:
        return run.path.name
    parts = Path(str(scene)).parent.parts
    return "/".join(parts[-2:]) if parts else str(scene)


def header_html(run: RunDir) -> str:
    s = run.summary
    name = scan_title(run)
    views = s.get("views") or {}
    bits = [f"run folder <code>{esc(run.path.name)}</code>"]
    if views:
        bits.append(f"{views.get('fitted', '?')} photos fitted, {views.get('heldout', '?')} held out")
    if s.get("texture_size"):
        bits.append(f"texture {s['texture_size']}×{s['texture_size']}")
    if "seed" in s:
        bits.append(f"seed {esc(s['seed'])}")
    stamp = time.strftime("%Y-%m-%d %H:%M", time.localtime((run.path / "summary.json").stat().st_mtime)) \
        if run.has("summary.json") else ""
    if stamp:
        bits.append(stamp)
    return (f'<header class="top"><h1>Scan report: {esc(name)}</h1>'
            f'<span class="meta">{" · ".join(bits)}</span></header>')


def _unique_best(vals: dict[str, Any]) -> str | None:
    """The method with the strictly highest finite value (None on a tie or with fewer than two)."""
    finite = sorted(((float(v), m) for m, v in vals.items() if v is not None and math.isfinite(float(v))),
                    reverse=True)
    if len(finite) < 2 or finite[0][0] == finite[1][0]:
        return None
    return finite[0][1]


def _best(run: RunDir, view: str, key: str) -> str | None:
    return _unique_best({m: run.view_scores(m, view).get(key) for m in run.methods})


def view_html(run: RunDir, view: str) -> str:
    best_psnr, best_ssim = _best(run, view, "psnr"), _best(run, view, "ssim")
    cells = []
    for m in ("photo", *run.methods):
        img = run.heldout_image(view, m)
        label = "Photo (held out)" if m == "photo" else method_label(m)
        if img is not None:
            pic = (f'<a href="heldout/{esc(img.name)}"><img class="px" src="{file_uri(img)}" '
                   f'alt="{esc(label)}, view {esc(view)}"></a>')
        else:
            stage = "score" if m == "photo" else {"baseline": "baseline bake", "baked": "bake", "neural": "fit"}.get(m, m)
            pic = absent(f"not produced: the {stage} stage has not run")
        if m == "photo":
            cap = '<span class="note">not used in the fit</span>'
        else:
            sc = run.view_scores(m, view)
            p = f'<span class="{"best" if m == best_psnr else ""}">PSNR {num(sc.get("psnr"), 2, " dB")}</span>'
            q = f'<span class="{"best" if m == best_ssim else ""}">SSIM {num(sc.get("ssim"), 3)}</span>'
            cap = f"{p} · {q}" if sc else '<span class="note">no score</span>'
        cells.append(f'<figure>{pic}<figcaption><span class="lab">{esc(label)}</span>{cap}</figcaption></figure>')
    return f'<div class="view"><h3>View {esc(view)}</h3><div class="quad">{"".join(cells)}</div></div>'


def heldout_html(run: RunDir) -> str:
    views = run.heldout_views
    intro = ('<p class="note">Each row is a photo that was kept out of the fit, next to the same view '
             'rendered by each method. Scores are computed inside the object mask on sRGB values; the '
             'best of each comparison is highlighted. Click an image for full size.</p>')
    if not views:
        body = absent("no held-out views in this run: mark some views `holdout: true` in scene.yaml "
                       "to measure how well the texture predicts unseen photos")
    else:
        body = "".join(view_html(run, v) for v in views)
    return f'<section id="heldout"><h2>Held-out views</h2>{intro}{body}</section>'


def curves_html(run: RunDir) -> str:
    title = '<section id="curves"><h2>Fit</h2>'
    if not run.history:
        return f"{title}{absent('no fit history: the fit stage has not run')}</section>"
    figs = [plots.loss_figure(run.history),
            plots.psnr_figure(run.history, run.method_scores("baseline").get("psnr"))]
    imgs = "".join(f'<img src="{data_uri(plots.figure_png(f))}" alt="fit curve">' for f in figs if f is not None)
    if not imgs:
        return f"{title}{absent('fit/history.json holds no steps yet')}</section>"
    return (f'{title}<p class="note">Loss while fitting, and the PSNR of the neural render on the held-out '
            f'photos at each evaluation (the dashed line is the classical bake).</p>'
            f'<div class="pair">{imgs}</div></section>')


def textures_html(run: RunDir) -> str:
    cells = []
    for rel, label in (("texture.png", "Baked texture"), ("baseline_texture.png", "Classical bake")):
        if run.has(rel):
            uri, (w, h) = thumbnail_uri(run.path / rel, TEXTURE_THUMB_PX)
            cells.append(f'<figure style="margin:0"><a href="{rel}"><img src="{uri}" alt="{label}"></a>'
                         f'<figcaption class="note">{label}, {w}×{h} (<a href="{rel}">{rel}</a>)</figcaption></figure>')
        else:
            cells.append(f'<figure style="margin:0">{absent(f"{rel} not produced ({_stage_of(rel)} stage)")}'
                         f'<figcaption class="note">{label}</figcaption></figure>')
    return f'<section id="textures"><h2>Textures</h2><div class="pair">{"".join(cells)}</div></section>'


def timings_html(run: RunDir) -> str:
    t = {k: v for k, v in (run.summary.get("timings_s") or {}).items() if isinstance(v, (int, float))}
    if not t:
        return f'<section id="timings"><h2>Timings</h2>{absent("no timings recorded")}</section>'
    total = t.pop("total", None)
    longest = max(t.values(), default=0) or 1
    rows = "".join(f'<tr><th>{esc(k)}</th><td class="n">{seconds(v)}</td><td style="width:55%">'
                   f'<div class="bar" style="width:{100 * v / longest:.1f}%"></div></td></tr>' for k, v in t.items())
    if total is not None:
        rows += f'<tr><th>whole run</th><td class="n"><b>{seconds(total)}</b></td><td></td></tr>'
    return (f'<section id="timings"><h2>Timings</h2><p class="note">Wall-clock seconds per stage; a stage '
            f'skipped because its result was already there shows the time it took when it ran.</p>'
            f'<div class="scroll"><table><tbody>{rows}</tbody></table></div></section>')


def config_html(run: RunDir) -> str:
    cmd = ""
    if run.overrides:
        cmd = ('<p class="note">Command that reproduces this run:</p>'
               f'<pre>featuretex {esc(" ".join(run.overrides))}</pre>')
    full = (f'<details><summary>Full configuration (.hydra/config.yaml)</summary><pre>{esc(run.config_text)}</pre>'
            "</details>") if run.config_text else absent(".hydra/config.yaml not found")
    return f'<section id="config"><h2>Configuration</h2>{cmd}{full}</section>'


def assumptions_html(run: RunDir) -> str:
    """summary.json's warnings (suspicious inputs) and inferred items (what the run decided)."""
    warnings = [w for w in run.summary.get("warnings") or [] if isinstance(w, str)]
    inferred = [i for i in run.summary.get("inferred") or [] if isinstance(i, dict)]
    if not warnings and not inferred:
        return ""
    parts = []
    if warnings:
        parts.append('<p class="note">Warnings: evidence against a few views only, so the run went on. '
                     'Check these inputs.</p><ul class="missing">'
                     + "".join(f"<li>{esc(w)}</li>" for w in warnings) + "</ul>")
    if inferred:
        parts.append('<p class="note">Decided by this run (not given in the scene file):</p><ul>'
                     + "".join(f"<li><b>{esc(str(i.get('what', '')))}</b>: {esc(str(i.get('detail', '')))}</li>"
                               for i in inferred) + "</ul>")
    return f'<section id="assumptions"><h2>Warnings and assumptions</h2>{"".join(parts)}</section>'


def missing_html(run: RunDir) -> str:
    gone = run.missing()
    items = "".join(f"<li><code>{esc(f)}</code>: the {esc(st)} stage has not written it, so this page lacks "
                    f"{esc(lost)}.</li>" for f, st, lost in gone)
    items += "".join(f"<li>{esc(p)}</li>" for p in run.problems)
    if not items:
        return ""
    return (f'<section id="missing"><h2>Not in this run</h2><ul class="missing">{items}</ul></section>')




# ---------------------------------------------------------------------------------------------
# page
# ---------------------------------------------------------------------------------------------
def _run_only(draw: Callable[[RunDir], str]) -> Callable[[Page], str]:
    return lambda page: draw(page.run)


SECTIONS: tuple[tuple[str, Callable[[Page], str]], ...] = (
    ("header", _run_only(header_html)), ("verdict", verdict_html), ("assumptions", _run_only(assumptions_html)),
    ("deliverables", lambda page: '<div class="top2">' + _section("deliverables", deliverables_html, page)
     + _section("quality", quality_html, page) + "</div>"), ("view3d", viewer_html), ("closer", closer_html), ("where", where_html),
    ("touchup", _run_only(touchup_html)), ("errormap", uvmap_html),
    ("heldout", _run_only(heldout_html)), ("curves", _run_only(curves_html)), ("textures", _run_only(textures_html)),
    ("timings", _run_only(timings_html)), ("config", _run_only(config_html)), ("missing", _run_only(missing_html)))


def _section(name: str, draw: Callable[[Page], str], page: Page | None) -> str:
    """One section's HTML; a section that fails on odd data says so instead of losing the report."""
    try:
        return draw(page)
    except Exception as e:
        log.warning("report: section '%s' not drawn (%s: %s)", name, type(e).__name__, e)
        return (f'<section id="{name}"><h2>{esc(name)}</h2>'
                f"{absent(f'this part could not be drawn: {type(e).__name__}: {e}')}</section>")


def render_page(run: RunDir) -> tuple[str, Page]:
    page = Page(run)
    name = scan_title(run)
    word = describe(run.verdict)[0]
    body = "".join(_section(n, draw, page) for n, draw in SECTIONS)
    return ("<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f'<meta http-equiv="Content-Security-Policy" content="{scripts.policy(page.scripts)}">'
            f"<title>{esc(name)}: {esc(word)}</title><style>{CSS}</style></head>"
            f"<body><main>{body}</main>{scripts.tags(page.scripts)}</body></html>\n"), page


def page_bytes(text: str) -> dict[str, int]:
    """Bytes (UTF-8) of each part of a report page: every <section> by id, the inline scripts
    (three.js and ours), and the rest; largest first."""
    parts: dict[str, int] = {}
    for m in re.finditer(r'<section id="([^"]+)".*?</section>', text, flags=re.S):
        parts[m.group(1)] = parts.get(m.group(1), 0) + len(m.group(0).encode())
    parts["scripts"] = sum(len(m.group(0).encode()) for m in re.finditer(r"<script>.*?</script>", text, flags=re.S))
    parts["rest"] = len(text.encode()) - sum(parts.values())
    return dict(sorted(parts.items(), key=lambda kv: -kv[1]))


def write_report(run_dir: Path) -> Path:
    """Write `run_dir/report.html`, error_map_views.png and preview.png (a still of the delivered
    model, for the batch index) from what the run dir holds; return the report's path."""
    t0 = time.perf_counter()
    run = read_run_dir(Path(run_dir))
    out = run.path / "report.html"
    text, page = render_page(run)
    write_text(out, text)
    still = page.preview()
    if still is not None:
        write_bytes(run.path / PREVIEW_FILE, image_png(still))
    top = ", ".join(f"{k} {v / 1e6:.1f}" for k, v in list(page_bytes(text).items())[:3])
    log.info("report: %s (%.1f s, %.1f MB; largest parts in MB: %s)", out, time.perf_counter() - t0,
             len(text.encode()) / 1e6, top)
    return out
