"""The top of the report, in the order a reader needs it: the verdict and its reasons, what the
client gets (files, triangles, texture, size), then how close the result comes to photos the fit
never saw, led by the figure that matches what a person sees."""

from __future__ import annotations

import math
from typing import Any

from PIL import Image

from featuretex.report.context import Page
from featuretex.report.inline import esc, num
from featuretex.report.rundir import METHOD_LABELS, RunDir
from featuretex.report.verdicts import describe

DELIVERED = "baked"
# (summary key, column heading, decimals): the headline figure first
QUALITY = (("psnr_tolerant", "alignment-tolerant PSNR", 2), ("ssim", "SSIM", 3), ("psnr", "plain PSNR", 2),
           ("psnr_gaincomp", "PSNR, exposure removed", 2))
ROLE = {"baked": "what the client gets", "baseline": "what an ordinary bake gives",
        "neural": "preview only: not delivered", "touchup": "after the geometry touch-up"}
TOLERANT_IN_WORDS = ("Alignment-tolerant PSNR compares each render with a photo the fit never saw, letting "
                     "every 16 × 16-pixel patch shift by up to 3 pixels: it rewards sharp, unghosted detail "
                     "and forgives the slight misplacement an imperfect scan causes. Higher is better.")


def _items(x: Any) -> list:
    return x if isinstance(x, list) else ([] if x is None else [x])


def verdict_html(page: Page) -> str:
    run = page.run
    word, what, colour = describe(run.verdict)
    reasons = "".join(f"<li>{esc(r)}</li>" for r in _items(run.summary.get("reasons")))
    code = f' <span class="chip">{esc(run.verdict)}</span>' if run.verdict else ""
    return (f'<section class="verdict p1" id="verdict" style="--v:{colour}">'
            f'<p class="word">{esc(word)}{code}</p><p class="what">{esc(what)}</p>'
            f'{f"<ul class=reasons>{reasons}</ul>" if reasons else ""}</section>')


def _mb(n: int) -> str:
    """A file size as people read it: 1.3 MB, 86 kB, 186 bytes."""
    if n >= 1e5:
        return f"{n / 1e6:.1f} MB"
    return f"{n / 1e3:.0f} kB" if n >= 1e3 else f"{n} bytes"


def _size_text(page: Page) -> str:
    """The model's bounding box as lengths (glTF frame: metres once the frame is known)."""
    m = page.model
    if m is None:
        return ""
    v = m.mesh.vertices @ m.to_gltf[:3, :3].T
    w, h, d = (v.max(axis=0) - v.min(axis=0)).tolist()
    if "gltf_from_scene" in page.run.summary:
        def length(x: float) -> str:
            return f"{x * 100:.1f} cm" if x < 1 else f"{x:.2f} m"
        return f"{length(h)} tall, {length(w)} wide, {length(d)} deep"
    return f"{h:.3g} × {w:.3g} × {d:.3g} {esc(page.run.summary.get('unit', 'units'))} (height × width × depth)"


def deliverables_html(page: Page) -> str:
    run = page.run
    rows = []
    if run.has("model.glb"):
        bits = []
        if page.model is not None:
            bits.append(f"{len(page.model.mesh.faces):,} triangles")
        if run.has("texture.png"):
            with Image.open(run.path / "texture.png") as im:
                bits.append(f"texture {im.width} × {im.height}")
        size = _size_text(page)
        if size:
            bits.append(size)
        rows.append(f'<li><a href="model.glb">model.glb</a> <span class="sz">{_mb((run.path / "model.glb").stat().st_size)}'
                    f'</span><br><span class="note">glTF 2.0, opens in any 3D viewer: {esc(", ".join(bits))}</span></li>')
    else:
        rows.append('<li class="note">model.glb: not produced (the export stage has not run)</li>')
    obj = [f for f in ("model.obj", "model.mtl", "texture.png") if run.has(f)]
    if obj:
        links = " + ".join(f'<a href="{f}">{f}</a> <span class="sz">{_mb((run.path / f).stat().st_size)}</span>'
                           for f in obj)
        rows.append(f'<li>{links}<br><span class="note">the same model for tools that want OBJ</span></li>')
    return (f'<section id="deliverables" class="p1"><h2>What the client gets</h2><ul class="files">{"".join(rows)}'
            f"</ul>{headline_figure_html(run)}</section>")


def headline_figure_html(run: RunDir) -> str:
    """One sentence with the delivered texture's alignment-tolerant PSNR against the classical bake."""
    got, base = run.method_scores(DELIVERED).get("psnr_tolerant"), run.method_scores("baseline").get("psnr_tolerant")
    if not _finite(got):
        return ""
    gain = ""
    if _finite(base):
        d = float(got) - float(base)
        gain = (f' <span class="delta {"up" if d > 0 else "down"}">{d:+.1f} dB</span> against the classical '
                f"bake ({num(base, 1, ' dB')})")
    return (f'<p class="figure">Delivered texture on photos the fit never saw: <b>{num(got, 1, " dB")}</b> '
            f'alignment-tolerant PSNR{gain}.</p>')


def _finite(x: Any) -> bool:
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def method_label(m: str) -> str:
    return METHOD_LABELS.get(m, m.replace("_", " ").capitalize())


def quality_html(page: Page) -> str:
    run = page.run
    present = [m for m in run.methods if run.method_scores(m)]
    if not present:
        return ('<section id="quality" class="p1"><h2>How close to the photos</h2>'
                '<p class="note">No held-out scores: mark some views <code>holdout: true</code> in scene.yaml to '
                "measure how well the texture predicts photos it never saw.</p></section>")
    order = [DELIVERED] + [m for m in present if m != DELIVERED] if DELIVERED in present else present
    head = "".join(f'<th class="n">{esc(h)}</th>' for _, h, _ in QUALITY)
    rows = []
    for m in order:
        sc = run.method_scores(m)
        cells = "".join(f'<td class="n">{num(sc.get(k), d)}</td>' for k, _, d in QUALITY)
        cls = ' class="delivered"' if m == DELIVERED else ""
        rows.append(f'<tr{cls}><th>{esc(method_label(m))}<span class="role">{esc(ROLE.get(m, ""))}</span></th>{cells}</tr>')
    return ('<section id="quality" class="p1"><h2>How close to the photos</h2>'
            f'<p class="plain">{esc(TOLERANT_IN_WORDS)}</p>'
            f'<div class="scroll"><table class="quality"><thead><tr><th>held-out photos, {len(run.heldout_views)}'
            f'</th>{head}</tr></thead><tbody>{"".join(rows)}</tbody></table></div>'
            '<p class="note">The first row is the one that matters: it is the texture inside model.glb. Plain PSNR '
            "counts every pixel of misplacement as an error, so it changes little even when ghosting is gone; "
            "SSIM (0 to 1) measures how well local structure matches.</p></section>")
