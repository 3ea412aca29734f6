"""The "Look closer" section: per detail, the held-out photo beside a before/after slider of the
classical bake and the delivered texture, all at the photo's own pixels (enlarged, never
resampled); the first detail also appears, side by side, on the printed summary."""

from __future__ import annotations

from featuretex.report import scripts
from featuretex.report.closer import Detail, cut
from featuretex.report.context import Page
from featuretex.report.inline import absent, data_uri, esc, image_png

ZOOM = 3        # crop pixels shown per photo pixel on screen (128-pixel crops -> 384 px)


def _uri(page: Page, d: Detail, method: str) -> str:
    return data_uri(image_png(cut(page.run.path / "heldout" / f"{d.view}_{method}.png", d.box)))


def detail_html(page: Page, n: int, d: Detail) -> str:
    photo, before, after = (_uri(page, d, m) for m in ("photo", "baseline", "baked"))
    x0, y0, x1, y1 = d.box
    px = (x1 - x0) * ZOOM
    where = f"view {esc(d.view)}, pixels {x0}–{x1} × {y0}–{y1}"
    return (f'<div class="detail{" first" if n == 1 else ""}">'
            f'<figure class="photo"><img class="px" src="{photo}" width="{px}" height="{px}" '
            f'alt="held-out photo, detail {n}"><figcaption><b>Photo</b> (held out<span class="loc">, {where}</span>)'
            "</figcaption></figure>"
            f'<figure class="cmp" style="--cut:50%"><div class="cmp-pics">'
            f'<img class="px" src="{before}" width="{px}" height="{px}" alt="classical bake, detail {n}">'
            f'<img class="px after" src="{after}" width="{px}" height="{px}" alt="delivered texture, detail {n}">'
            f'<span class="cmp-line"></span></div>'
            f'<input type="range" min="0" max="100" value="50" aria-label="move the cut between classical and '
            f'delivered, detail {n}">'
            f'<figcaption><span><b>Classical bake</b> ◂</span><span>▸ <b>Delivered texture</b></span></figcaption>'
            f"</figure></div>")


def closer_html(page: Page) -> str:
    title = ('<section id="closer" class="p1"><h2>Look closer</h2><p class="note">Where the delivered texture '
             'differs most from a classical bake, at the photos\' own resolution. Drag across a picture to '
             'move between the classical bake (left) and the delivered texture (right); the photo beside '
             'it was never used in the fit. The places are picked from the two textures alone, not by '
             'comparing with these photos.</p>')
    if not page.details:
        why = "no held-out renders of both textures" if not page.run.heldout_views else "no detail found"
        return f"{title}{absent(why)}</section>"
    page.script(scripts.asset("js/compare.js"))
    return title + "".join(detail_html(page, n, d) for n, d in enumerate(page.details, 1)) + "</section>"
