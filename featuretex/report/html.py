"""report.html: one self-contained page per run (images inlined as data URIs, no external requests).

Order of the page: verdict and reasons; warnings and what the run assumed; held-out views side by side; error map with legend and the
worst regions; turntable of the exported model; fit curves; textures; timings; exact config; what
this run did not produce. Each section shows what exists and says plainly what is missing.
"""

from __future__ import annotations

import logging
import math
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np
import yaml
from PIL import Image

from featuretex.atomic import write_text
from featuretex.diagnose.verdict import SYMBOLS
from featuretex.report import errormap, plots
from featuretex.report.inline import data_uri, esc, file_uri, image_png, num, percent, seconds, thumbnail_uri
from featuretex.report.rundir import ARTEFACTS, METHOD_LABELS, METHODS, RunDir, read_run_dir
from featuretex.report.style import CSS
from featuretex.report.touchup import touchup_html
from featuretex.report.verdicts import describe

log = logging.getLogger("featuretex")

TURNTABLE_FILE = "turntable.png"        # animated PNG beside the report
TURNTABLE_FRAMES, TURNTABLE_PX, STILLS = 24, 320, 6   # software GL: the MSAA read-back costs per pixel
TEXTURE_THUMB_PX = 512
METRICS = (("psnr", "PSNR", "dB"), ("ssim", "SSIM", ""),
           ("psnr_gaincomp", "PSNR, exposure removed", "dB"),
           ("psnr_tolerant", "PSNR, ±3 px tolerant", "dB"))
VERDICT_CLASS = {"rescan": "uncovered", "fix-geometry": "geometry", "refine-texture": "texture"}
SHORT_LABELS = {"baseline": "Classical", "baked": "Baked", "neural": "Neural"}


# ---------------------------------------------------------------------------------------------
# sections
# ---------------------------------------------------------------------------------------------
def _absent(what: str) -> str:
    return f'<div class="absent">{esc(what)}</div>'


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


def gain_html(run: RunDir) -> str:
    base = run.method_scores("baseline").get("psnr")
    cells = []
    for m in METHODS:
        p = run.method_scores(m).get("psnr")
        if p is None:
            continue
        delta = "" if m == "baseline" or base is None else f" ({float(p) - float(base):+.2f} dB)"
        cells.append(f"<div>{esc(METHOD_LABELS[m])}<br><b>{num(p, 2, ' dB')}</b>{esc(delta)}</div>")
    if not cells:
        return ""
    return ('<p class="note">Held-out PSNR: how closely each method reproduces the photos that were kept '
            'out of the fit (higher is better).</p>'
            f'<div class="gain">{"".join(cells)}</div>')


def verdict_html(run: RunDir) -> str:
    word, what, colour = describe(run.verdict)
    reasons = run.summary.get("reasons") or []
    reasons = reasons if isinstance(reasons, list) else [reasons]
    items = "".join(f"<li>{esc(r)}</li>" for r in reasons)
    rlist = f"<ul>{items}</ul>" if items else ""
    code = f' <span class="chip">{esc(run.verdict)}</span>' if run.verdict else ""
    return (f'<section class="verdict" id="verdict" style="--v:{colour}">'
            f'<p class="word">{esc(word)}{code}</p><p class="what">{esc(what)}</p>{rlist}'
            f"{gain_html(run)}</section>")


def _unique_best(vals: dict[str, Any]) -> str | None:
    """The method with the strictly highest finite value (None on a tie or with fewer than two)."""
    finite = sorted(((float(v), m) for m, v in vals.items() if v is not None and math.isfinite(float(v))),
                    reverse=True)
    if len(finite) < 2 or finite[0][0] == finite[1][0]:
        return None
    return finite[0][1]


def _best(run: RunDir, view: str, key: str) -> str | None:
    return _unique_best({m: run.view_scores(m, view).get(key) for m in METHODS})


def view_html(run: RunDir, view: str) -> str:
    best_psnr, best_ssim = _best(run, view, "psnr"), _best(run, view, "ssim")
    cells = []
    for m in ("photo", *METHODS):
        img = run.heldout_image(view, m)
        label = METHOD_LABELS[m]
        if img is not None:
            pic = (f'<a href="heldout/{esc(img.name)}"><img class="px" src="{file_uri(img)}" '
                   f'alt="{esc(label)}, view {esc(view)}"></a>')
        else:
            stage = "score" if m == "photo" else {"baseline": "baseline bake", "baked": "bake", "neural": "fit"}[m]
            pic = _absent(f"not produced: the {stage} stage has not run")
        if m == "photo":
            cap = '<span class="note">not used in the fit</span>'
        else:
            sc = run.view_scores(m, view)
            p = f'<span class="{"best" if m == best_psnr else ""}">PSNR {num(sc.get("psnr"), 2, " dB")}</span>'
            q = f'<span class="{"best" if m == best_ssim else ""}">SSIM {num(sc.get("ssim"), 3)}</span>'
            cap = f"{p} · {q}" if sc else '<span class="note">no score</span>'
        cells.append(f'<figure>{pic}<figcaption><span class="lab">{esc(label)}</span>{cap}</figcaption></figure>')
    return f'<div class="view"><h3>View {esc(view)}</h3><div class="quad">{"".join(cells)}</div></div>'


def scores_table_html(run: RunDir) -> str:
    present = [m for m in METHODS if run.method_scores(m)]
    if not present:
        return ""
    head = "".join(f'<th class="n">{esc(SHORT_LABELS[m])}</th>' for m in present)
    rows = []
    for key, label, unit in METRICS:
        vals = {m: run.method_scores(m).get(key) for m in present}
        best = _unique_best(vals)
        tds = "".join(f'<td class="n{" best" if m == best else ""}">{num(vals[m], 3 if key == "ssim" else 2)}</td>'
                      for m in present)
        rows.append(f"<tr><th>{esc(label)}{' (' + unit + ')' if unit else ''}</th>{tds}</tr>")
    return (f'<div class="scroll"><table><thead><tr><th>all held-out views</th>{head}</tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table></div>')


def heldout_html(run: RunDir) -> str:
    views = run.heldout_views
    intro = ('<p class="note">Each row is a photo that was kept out of the fit, next to the same view '
             'rendered by each method. Scores are computed inside the object mask on sRGB values; the '
             'best of each comparison is highlighted. Click an image for full size.</p>')
    if not views:
        body = _absent("no held-out views in this run: mark some views `holdout: true` in scene.yaml "
                       "to measure how well the texture predicts unseen photos")
    else:
        body = scores_table_html(run) + "".join(view_html(run, v) for v in views)
    return f'<section id="heldout"><h2>Held-out views</h2>{intro}{body}</section>'


def _config_value(run: RunDir, dotted: str, default: Any) -> Any:
    try:
        node: Any = yaml.safe_load(run.config_text) if run.config_text else {}
        for k in dotted.split("."):
            node = node[k]
        return node
    except (KeyError, TypeError, yaml.YAMLError):
        return default


def errormap_html(run: RunDir) -> str:
    title = '<section id="errormap"><h2>Error map</h2>'
    if not run.has("error_map.npz"):
        if run.has("error_map.png"):
            return (f'{title}<p class="note">The raw fields (error_map.npz) are missing, so no regions can '
                    f'be ranked; the painted map carries its own legend.</p>'
                    f'<img class="px" src="{file_uri(run.path / "error_map.png")}" alt="error map"></section>')
        return f"{title}{_absent('not produced: the diagnose stage has not run')}</section>"
    fields, unit = _error_fields(run)
    regions = errormap.find_regions(fields, first=VERDICT_CLASS.get(run.verdict or ""))
    im = errormap.outline_regions(errormap.painted(fields), regions, fields.cls.shape[0])
    legend = "".join(f'<li><span class="sw" style="background:rgb{errormap.COLOURS[c]}"></span><span>'
                     f"<b>{esc(errormap.LABELS[c])}</b>: {esc(errormap.MEANING[c])}</span></li>"
                     for c in errormap.LEGEND_ORDER)
    areas = run.summary.get("areas") or {}
    area_txt = ""
    if areas:
        area_txt = ('<p class="note">Share of the surface: uncovered '
                    f'{percent(areas.get("uncovered"))}, geometry-limited {percent(areas.get("geometry_limited"))}, '
                    f'texture-limited {percent(areas.get("texture_limited"))}.</p>')
    png = ' (<a href="error_map.png">error_map.png</a>, with its legend)' if run.has("error_map.png") else ""
    return (f'{title}<p class="note">The texture layout (UV space, v up) coloured by what limits each part of '
            f'the surface{png}. The largest problem regions are outlined and numbered.</p>'
            f'<div class="two"><img class="px" src="{data_uri(image_png(im))}" '
            f'alt="error map with the worst regions numbered"><div><ul class="legend">{legend}</ul>'
            f"{area_txt}</div></div>{regions_table_html(regions, unit)}</section>")


def _error_fields(run: RunDir) -> tuple[errormap.ErrorFields, str]:
    """The npz fields with texel areas and positions from model.glb's UVs; the length unit."""
    with np.load(run.path / "error_map.npz") as z:
        size = int(np.asarray(z["geometry"]).shape[0])
    k = errormap.reduction(size)
    layout = None
    if run.has("model.glb"):
        try:
            layout = errormap.layout_from_model(run.path / "model.glb", size // k)
        except Exception as e:  # the map still shows; region sizes fall back to texel counts
            log.warning("report: cannot lay out the UVs of model.glb (%s)", e)
    fields = errormap.load_fields(run.path / "error_map.npz", layout,
                                  min_views=int(_config_value(run, "diagnose.min_views", 2)), k=k)
    return fields, str(run.summary.get("unit", ""))


def area_text(a: float, unit: str) -> str:
    """A surface area in scene units^2 as text: metric scenes in mm² / cm² / m², others in their unit
    (as the diagnosis writes lengths)."""
    from featuretex.scene.manifest import UNITS

    if unit not in UNITS or UNITS[unit] not in (1.0, 0.01, 0.001):
        return f"{a:.3g} {SYMBOLS.get(unit, unit or 'units')}²"
    m2 = a * UNITS[unit] ** 2
    if m2 < 1e-4:
        return f"{m2 * 1e6:.3g} mm²"
    return f"{m2 * 1e4:.3g} cm²" if m2 < 1.0 else f"{m2:.3g} m²"


def offset_text(d: float, unit: str) -> str:
    """A signed length along the normal (scene units) as text, in the diagnosis's own format."""
    from featuretex.diagnose.verdict import length
    from featuretex.scene.manifest import UNITS

    if not math.isfinite(d):
        return "—"
    return ("+" if d > 0 else "") + length(d, unit, UNITS.get(unit, 1.0))


def regions_table_html(regions: list[errormap.Region], unit: str) -> str:
    if not regions:
        return '<p class="note">No problem region covers more than 0.1 % of the surface.</p>'
    rows = []
    for i, r in enumerate(regions, 1):
        code = {v: k for k, v in errormap.KINDS.items()}[r.kind]
        area = esc(area_text(r.area, unit)) if r.area is not None else "—"
        where = ", ".join(f"{c:.3g}" for c in r.centre) + f" {esc(SYMBOLS.get(unit, unit))}" if r.centre else "—"
        off = esc(offset_text(r.offset, unit)) if r.kind == "geometry" else "—"
        rows.append(f'<tr><td class="n">{i}</td><td><span class="sw" style="display:inline-block;width:12px;'
                    f'height:12px;vertical-align:-1px;background:rgb{errormap.COLOURS[code]}"></span> '
                    f'{esc(errormap.LABELS[code])}</td><td class="n">{percent(r.share)}</td><td class="n">{area}</td>'
                    f'<td class="n">{where}</td><td class="n">{off}</td>'
                    f'<td class="n">{r.uv[0]:.2f}, {r.uv[1]:.2f}</td></tr>')
    return ('<div class="scroll"><table><thead><tr><th class="n">#</th><th>largest regions</th>'
            '<th class="n">surface</th><th class="n">area</th><th class="n">centre (x, y, z)</th>'
            '<th class="n">offset along normal</th><th class="n">UV</th>'
            f'</tr></thead><tbody>{"".join(rows)}</tbody></table></div>')


def turntable_html(run: RunDir) -> str:
    title = '<section id="turntable"><h2>Turntable</h2>'
    if not run.has("model.glb"):
        return f"{title}{_absent('not produced: the export stage has not written model.glb')}</section>"
    try:
        from featuretex.report import turntable

        frames = turntable.turntable(run.path / "model.glb", run.path / TURNTABLE_FILE, frames=TURNTABLE_FRAMES,
                                     size=TURNTABLE_PX)
    except Exception as e:  # no EGL, damaged file...: the rest of the report still stands
        log.warning("report: turntable not rendered (%s: %s)", type(e).__name__, e)
        return f"{title}{_absent(f'could not render model.glb: {type(e).__name__}: {e}')}</section>"
    anim = file_uri(run.path / TURNTABLE_FILE)
    step = max(len(frames) // STILLS, 1)
    stills = "".join(f'<img class="turn" src="{data_uri(image_png(f))}" alt="turntable frame {k + 1}">'
                     for k, f in enumerate(frames[::step][:STILLS]))
    obj = ', <a href="model.obj">model.obj</a>' if run.has("model.obj") else ""
    return (f'{title}<p class="note">The exported model.glb as a glTF viewer shows it (unlit: the texture '
            f'as baked, no extra shading), turning once every four seconds.</p><div class="turngrid">'
            f'<a href="{TURNTABLE_FILE}"><img class="turn" src="{anim}" alt="turntable animation"></a>'
            f'<div><div class="strip">{stills}</div><p class="note">Frames every {360 // STILLS}°. Files: '
            f'<a href="model.glb">model.glb</a>{obj}</p></div></div></section>')


def curves_html(run: RunDir) -> str:
    title = '<section id="curves"><h2>Fit</h2>'
    if not run.history:
        return f"{title}{_absent('no fit history: the fit stage has not run')}</section>"
    figs = [plots.loss_figure(run.history),
            plots.psnr_figure(run.history, run.method_scores("baseline").get("psnr"))]
    imgs = "".join(f'<img src="{data_uri(plots.figure_png(f))}" alt="fit curve">' for f in figs if f is not None)
    if not imgs:
        return f"{title}{_absent('fit/history.json holds no steps yet')}</section>"
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
            cells.append(f'<figure style="margin:0">{_absent(f"{rel} not produced ({_stage_of(rel)} stage)")}'
                         f'<figcaption class="note">{label}</figcaption></figure>')
    return f'<section id="textures"><h2>Textures</h2><div class="pair">{"".join(cells)}</div></section>'


def timings_html(run: RunDir) -> str:
    t = {k: v for k, v in (run.summary.get("timings_s") or {}).items() if isinstance(v, (int, float))}
    if not t:
        return f'<section id="timings"><h2>Timings</h2>{_absent("no timings recorded")}</section>'
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
            "</details>") if run.config_text else _absent(".hydra/config.yaml not found")
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
SECTIONS: tuple[tuple[str, Callable[[RunDir], str]], ...] = (
    ("header", header_html), ("verdict", verdict_html), ("assumptions", assumptions_html),
    ("heldout", heldout_html), ("errormap", errormap_html), ("touchup", touchup_html),
    ("turntable", turntable_html), ("curves", curves_html), ("textures", textures_html),
    ("timings", timings_html), ("config", config_html), ("missing", missing_html))


def _section(name: str, draw: Callable[[RunDir], str], run: RunDir) -> str:
    """One section's HTML; a section that fails on odd data says so instead of losing the report."""
    try:
        return draw(run)
    except Exception as e:
        log.warning("report: section '%s' not drawn (%s: %s)", name, type(e).__name__, e)
        return (f'<section id="{name}"><h2>{esc(name)}</h2>'
                f"{_absent(f'this part could not be drawn: {type(e).__name__}: {e}')}</section>")


def render_page(run: RunDir) -> str:
    name = scan_title(run)
    word = describe(run.verdict)[0]
    body = "".join(_section(name, draw, run) for name, draw in SECTIONS)
    return ("<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; img-src data: 'self'; "
            "style-src 'unsafe-inline'\">"
            f"<title>{esc(name)}: {esc(word)}</title><style>{CSS}</style></head>"
            f"<body><main>{body}</main></body></html>\n")


def write_report(run_dir: Path) -> Path:
    """Write `run_dir/report.html` (and the turntable animation beside it) from what the run dir
    holds; return the report's path."""
    t0 = time.perf_counter()
    run = read_run_dir(Path(run_dir))
    out = run.path / "report.html"
    write_text(out, render_page(run))
    log.info("report: %s (%.1f s)", out, time.perf_counter() - t0)
    return out
