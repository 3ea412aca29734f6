"""The error map's legend as HTML: the same entries, wording and swatch pixels as the legend
drawn into error_map.png and error_map_views.png (featuretex.diagnose.palette)."""

from __future__ import annotations

from functools import cache

from featuretex.diagnose.classify import OFF
from featuretex.diagnose.palette import LEGEND, NOTE, SWATCH_PX, swatch
from featuretex.report.inline import data_uri, esc, image_png


@cache
def swatch_uri(code: int) -> str:
    return data_uri(image_png(swatch(code)))


def swatch_img(code: int, label: str, cls: str = "sw") -> str:
    return (f'<img class="{cls}" src="{swatch_uri(code)}" width="{SWATCH_PX}" height="{SWATCH_PX}" '
            f'alt="{esc(label)} swatch" data-class="{code}">')


def legend_html(compact: bool = False) -> str:
    """The legend list (class, label, meaning) and its note; `compact`: labels only, and only the
    classes that can be on the model's surface."""
    if compact:
        items = "".join(f"<li>{swatch_img(c, label)}<span>{esc(label)}</span></li>"
                        for c, label, _ in LEGEND if c != OFF)
        return f'<ul class="legend compact">{items}</ul>'
    items = "".join(f'<li>{swatch_img(c, label, "sw key")}<span><b>{esc(label)}</b><br><span class="note">{esc(meaning)}'
                    f"</span></span></li>" for c, label, meaning in LEGEND)
    return f'<ul class="legend" id="legend">{items}</ul><p class="note legend-note">{esc(NOTE)}</p>'
