"""The error map sections: on the object (six views with the regions numbered, the legend, the
region table) and in texture space (the UV map as the diagnosis painted it)."""

from __future__ import annotations

import math

from featuretex.diagnose.palette import LABELS
from featuretex.diagnose.verdict import SYMBOLS
from featuretex.report import errormap
from featuretex.report.context import VIEWS_FILE, Page
from featuretex.report.inline import absent, data_uri, esc, image_png, percent
from featuretex.report.legend import legend_html, swatch_img


def where_html(page: Page) -> str:
    """The six views of the error map on the model, with the legend beside them."""
    title = ('<section id="where" class="p1"><h2>Where on the object</h2>'
             '<p class="note">The error map painted on the delivered model, seen from six sides. Numbered '
             'outlines are the largest problem regions, each marked in the view that shows most of it.</p>')
    views = page.error_views
    if views is None:
        return f"{title}{absent('not drawn: ' + (page.why.get('error_views') or 'no model or error map'))}</section>"
    cells = "".join(f'<figure><img class="still" src="{data_uri(image_png(img))}" alt="error map, {esc(name)}">'
                    f"<figcaption>{esc(name)}</figcaption></figure>" for name, img in zip(views.names, views.images))
    return (f'{title}<div class="where"><div class="stills">{cells}</div><div class="key">{legend_html()}'
            f'<p class="note shares">{esc(page.areas_line())}</p><p class="note screen">The same views with '
            f'this legend: <a href="{VIEWS_FILE}">{VIEWS_FILE}</a>.</p></div></div></section>')


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


def _gain(pay: dict[str, float], key: str) -> str:
    v = pay.get(key)
    return "—" if v is None or not math.isfinite(v) else f"{round(v, 2) + 0.0:+.2f} dB"


def regions_table_html(page: Page) -> str:
    """The numbered regions as summary.json lists them, with the view that shows each best."""
    err = page.error
    if err is None:
        return ""
    if not err.regions:
        return '<p class="note">No problem region covers more than 0.1 % of the surface.</p>'
    names = page.error_views.names if page.error_views is not None else []
    shown = page.error_views.shown_in if page.error_views is not None else {}
    unit = err.unit
    code = {v: k for k, v in errormap.KINDS.items()}
    rows = []
    for r in err.regions:
        c = code[r.kind]
        area = esc(area_text(r.area, unit)) if r.area is not None else "—"
        where = ", ".join(f"{v:.3g}" for v in r.centre) + f" {esc(SYMBOLS.get(unit, unit))}" if r.centre else "—"
        off = esc(offset_text(r.offset, unit)) if r.kind == "geometry" else "—"
        view = esc(names[shown[r.number]]) if r.number in shown else '<span class="note">not seen from outside</span>'
        pay = (f'<td class="n">{_gain(r.payoff, "geometry")}</td><td class="n">{_gain(r.payoff, "texture")}</td>'
               if r.kind != "uncovered" else '<td class="n" colspan="2">rescan</td>')
        rows.append(f'<tr><td class="n"><span class="num">{r.number}</span></td><td>{swatch_img(c, LABELS[c])} '
                    f'{esc(LABELS[c])}</td><td class="n">{percent(r.share)}</td><td class="n">{area}</td>'
                    f'<td>{view}</td><td class="n">{where}</td><td class="n">{off}</td>{pay}'
                    f'<td class="n">{r.uv[0]:.2f}, {r.uv[1]:.2f}</td></tr>')
    return ('<div class="scroll"><table class="regions"><thead><tr><th class="n">#</th><th>largest regions</th>'
            '<th class="n">surface</th><th class="n">area</th><th>best seen</th><th class="n">centre (x, y, z)</th>'
            '<th class="n">offset along normal</th><th class="n">fixing the geometry</th>'
            '<th class="n">fitting longer</th><th class="n">UV</th>'
            f'</tr></thead><tbody>{"".join(rows)}</tbody></table></div>'
            '<p class="note">Centres are in the scan\'s own axes and units; the offset is how far the photographed '
            "surface lies outside (+) or inside (−) the mesh. The two gains are estimates of held-out PSNR made "
            "from the fitted views alone (see the README: what each fix would gain); read the geometry one as a "
            "lower bound and use both to rank.</p>")


def uvmap_html(page: Page) -> str:
    title = '<section id="errormap"><h2>Problem regions and the map in texture space</h2>'
    run = page.run
    err = page.error
    if err is None:
        if run.has("error_map.png"):
            return (f'{title}<p class="note">The raw fields (error_map.npz) are missing, so no regions can be ranked; '
                    f'the painted map carries its own legend.</p><img class="px" src="{data_uri((run.path / "error_map.png").read_bytes())}" '
                    f'alt="error map"></section>')
        return f"{title}{absent('not produced: the diagnose stage has not run')}</section>"
    im = errormap.outline_regions(errormap.painted(err.fields), err.regions, err.fields.cls.shape[0])
    png = ' (<a href="error_map.png">error_map.png</a>, with its legend)' if run.has("error_map.png") else ""
    return (f"{title}{regions_table_html(page)}"
            f'<p class="note">The texture layout (UV space, v up) coloured by what limits each part of the surface'
            f'{png}, the same regions outlined and numbered.</p>'
            f'<img class="px uvmap" src="{data_uri(image_png(im))}" alt="error map in texture space, regions numbered">'
            "</section>")
