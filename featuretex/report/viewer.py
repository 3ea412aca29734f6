"""The 3D view section: model.glb carried in the page (base64), with the classical bake and the
painted error map as alternative surfaces and the numbered regions pinned where they are; the
viewer itself is js/viewer.js on three.js (vendor/)."""

from __future__ import annotations

import base64
import json

import numpy as np

from featuretex.diagnose.palette import LABELS
from featuretex.report import errormap, scripts
from featuretex.report.context import Page
from featuretex.report.inline import absent, data_uri, esc, image_png
from featuretex.report.legend import legend_html

MODES = (("delivered", "Delivered texture"), ("classical", "Classical bake"), ("errors", "Error map"))


def region_pins(page: Page) -> list[dict]:
    """Per numbered region: its number, class label and its marker (a surface point inside it, from
    summary.json) in the glTF frame."""
    err, model = page.error, page.model
    if err is None or model is None:
        return []
    code = {v: k for k, v in errormap.KINDS.items()}
    pins = []
    for r in err.regions:
        if r.marker is None:
            continue
        at = model.to_gltf[:3, :3] @ np.asarray(r.marker) + model.to_gltf[:3, 3]
        pins.append({"n": r.number, "at": [round(float(c), 6) for c in at],
                     "label": f"{r.number}: {LABELS[code[r.kind]]}"})
    return pins


def viewer_data(page: Page) -> dict:
    run = page.run
    textures = {}
    if run.has("baseline_texture.png"):
        textures["classical"] = data_uri((run.path / "baseline_texture.png").read_bytes())
    if page.error is not None:
        textures["errors"] = data_uri(image_png(page.error.texture))
    return {"glb": base64.b64encode((run.path / "model.glb").read_bytes()).decode("ascii"),
            "textures": textures, "regions": region_pins(page)}


def viewer_html(page: Page) -> str:
    title = '<section id="view3d" class="screen"><h2>The delivered model in 3D</h2>'
    if page.model is None:
        return f'{title}{absent("no 3D view: " + page.why.get("model", "model.glb missing"))}</section>'
    data = viewer_data(page)
    page.script(scripts.asset(scripts.THREE))
    page.script(scripts.asset("js/viewer.js"))
    modes = "".join(f'<button type="button" data-mode="{m}" aria-pressed="false">{esc(label)}</button>'
                    for m, label in MODES if m == "delivered" or m in data["textures"])
    # JSON inside <script type="application/json"> is never run; "<" escaped so no text can close it
    blob = json.dumps(data, separators=(",", ":")).replace("<", "\\u003c")
    return (f'{title}<p class="note">Drag to turn the model, scroll or pinch to zoom, right-drag (or two fingers) '
            f'to move it. Switch the surface to compare the delivered texture with a classical bake, or to see '
            f'the error map on the object with its numbered regions.</p>'
            f'<div id="viewer3d" data-state="loading">'
            f'<div class="vw-bar"><div class="seg" role="group" aria-label="surface">{modes}</div>'
            f'<div class="seg" role="group" aria-label="shading"><button type="button" data-shade="lit" '
            f'aria-pressed="true">Lit</button><button type="button" data-shade="unlit" aria-pressed="false">'
            f'Unlit</button></div><button type="button" class="reset" data-act="reset">Reset view</button></div>'
            f'<div class="vw-stage"><canvas aria-label="3D view of model.glb"></canvas><div class="vw-pins" hidden>'
            f'</div><div class="vw-fail" hidden></div><noscript><div class="vw-fail">The 3D view needs '
            f'JavaScript.</div></noscript></div>'
            f'<div class="vw-legend" hidden>{legend_html(compact=True)}</div></div>'
            f'<script type="application/json" id="viewer3d-data">{blob}</script>'
            f'<p class="note">Unlit shows the texture exactly as stored (as a glTF viewer shows this unlit '
            f'model); lit adds a light from the camera to show the shape. three.js {esc(scripts.three_version())}, '
            f'carried inside this page.</p></section>')
