"""The report's geometry touch-up section (runs with `touchup=true`): what moved, where and how far,
what it gained on the held-out views against the estimates, round by round, with the caution that
the moved surface is a visual correction, not a measurement."""

from __future__ import annotations

from featuretex.diagnose.verdict import length
from featuretex.report.inline import esc, file_uri, num, percent

CAUTION = ("The touched-up mesh is a visual correction for previews: its surface was moved to where the "
           "photos agree best (photo consistency), not measured. Do not use it, or these offsets, to certify "
           "dimensions.")
SCORES = (("psnr", "PSNR (dB)", 2), ("psnr_tolerant", "alignment-tolerant PSNR (dB)", 2), ("ssim", "SSIM", 3))
SHOWN = (("baseline", "Classical bake"), ("baked", "Baked texture"), ("touchup", "Touched-up bake"))


def _gain(a, b) -> str:
    if a is None or b is None:
        return "—"
    return f"{a - b:+.2f}"


def touchup_html(run) -> str:
    """The section's HTML, or "" when the run has no touch-up."""
    s = run.summary
    t = s.get("touchup")
    held = s.get("heldout", {})
    if not t or "touchup" not in held:
        return ""
    from featuretex.scene.manifest import UNITS

    unit = str(s.get("unit", ""))
    L = lambda v: esc(length(float(v), unit, UNITS.get(unit, 1.0)))  # noqa: E731
    rows = "".join(
        f"<tr><th>{esc(label)}</th>" + "".join(f'<td class="n">{num(held.get(m, {}).get(k), d)}</td>' for m, _ in SHOWN)
        + f'<td class="n">{_gain(held["touchup"].get(k), held.get("baked", {}).get(k))}</td>'
        f'<td class="n">{_gain(held["touchup"].get(k), held.get("baseline", {}).get(k))}</td></tr>'
        for k, label, d in SCORES)
    head = "".join(f"<th class='n'>{esc(lab)}</th>" for _, lab in SHOWN)
    scores = (f'<div class="scroll"><table><thead><tr><th>held-out views</th>{head}<th class="n">vs baked</th>'
              f'<th class="n">vs classical</th></tr></thead><tbody>{rows}</tbody></table></div>')
    est = s.get("payoff_db", {})
    measured = _gain(held["touchup"].get("psnr"), held.get("baked", {}).get("psnr"))
    moved = (f"<p>{t.get('moved_vertices', 0)} vertices moved, {percent(t.get('moved_share'))} of the surface"
             + (f", around x {L(t['centre'][0])}, y {L(t['centre'][1])}, z {L(t['centre'][2])}" if t.get("centre") else "")
             + f": up to {L(t.get('offset_outward_max', 0))} outwards and {L(t.get('offset_inward_max', 0))} inwards "
             f"(median {L(t.get('offset_median_moved', 0))} where it moved; the sweep measured at most "
             f"{L(t.get('sweep_half_range', 0))} either way). The estimate before the touch-up: fixing the geometry "
             f"about {num(est.get('geometry'), 2, ' dB')}, fitting longer about {num(est.get('texture'), 2, ' dB')}; "
             f"measured on the held-out views: {esc(measured)} dB plain PSNR over the baked texture.</p>")
    rounds = "".join(f'<tr><td class="n">{r["round"]}</td><td class="n">{r["moved_vertices"]}</td>'
                     f'<td class="n">{num(r.get("evidence_gain_db"), 3)}</td><td>{"kept" if r["kept"] else "dropped"}'
                     f'</td><td>{esc(r.get("verdict") or "—")}</td></tr>' for r in t.get("rounds", []))
    table = ('<div class="scroll"><table><thead><tr><th class="n">round</th><th class="n">vertices moved</th>'
             '<th class="n">fitted-view evidence (dB)</th><th>result</th><th>verdict after</th></tr></thead>'
             f"<tbody>{rounds}</tbody></table></div>") if rounds else ""
    pics = ""
    for v in run.heldout_views[:2]:
        cells = ""
        for m, lab in (("photo", "Photo (held out)"), ("baked", "Baked texture"), ("touchup", "Touched-up bake")):
            img = run.path / "heldout" / f"{v}_{m}.png"
            if img.is_file():
                cells += (f'<figure><img class="px" src="{file_uri(img)}" alt="{esc(lab)}, view {esc(v)}">'
                          f'<figcaption><span class="lab">{esc(lab)}</span></figcaption></figure>')
        pics += f'<div class="view"><h3>View {esc(v)}</h3><div class="quad">{cells}</div></div>'
    files = ('<p class="note">Files: <a href="touchup/model.glb">touchup/model.glb</a>, touchup/model.obj, '
             '<a href="touchup/offsets.ply">touchup/offsets.ply</a> (per-vertex offset along the normal in scene '
             'units, coloured blue inwards, orange outwards).</p>')
    return (f'<section id="touchup"><h2>Geometry touch-up</h2><p class="note"><b>Caution.</b> {esc(CAUTION)}</p>'
            f"{moved}{scores}{table}{pics}{files}</section>")
