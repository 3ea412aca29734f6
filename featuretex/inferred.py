"""What a run decided for the user, in plain words: summary.json's `inferred` list.

Each entry is {"what": a short label, "detail": one plain sentence}; the report shows them with the
scene's warnings, so a reader sees which figures rest on assumptions rather than on the scene file.
"""

from __future__ import annotations

from typing import Any

from featuretex.scene.loaded import Scene


def _item(what: str, detail: str) -> dict[str, str]:
    return {"what": what, "detail": detail}


def _names(names: list[str], most: int = 5) -> str:
    shown = ", ".join(names[:most])
    return shown + (f" and {len(names) - most} more" if len(names) > most else "")


def _working_resolution(per_view: dict[str, Any]) -> dict[str, str] | None:
    """One line over summary.json's `working_resolution` ({view: {"scale", "size", "crop"}})."""
    scales = {n: float(w["scale"]) for n, w in per_view.items() if isinstance(w, dict) and "scale" in w}
    if not scales:
        return None
    reduced = sorted(n for n, s in scales.items() if s < 1.0)
    if not reduced:
        return _item("working resolution", f"all {len(scales)} photos are worked on at their full resolution, "
                     "cropped to the object (per view: working_resolution)")
    lo, hi = min(scales[n] for n in reduced), max(scales[n] for n in reduced)
    span = f"{lo:.2f}" if abs(hi - lo) < 0.005 else f"{lo:.2f} to {hi:.2f}"
    return _item("working resolution", f"{len(reduced)} of {len(scales)} photos are worked on reduced to {span} "
                 "of their resolution (about two working pixels per texel edge) and cropped to the object "
                 "(per view: working_resolution)")


def inferred_items(scene: Scene, texture_size: int, size_was_given: bool, summary: dict[str, Any]) -> list[dict]:
    """The run's assumptions and automatic choices, each as {"what", "detail"}."""
    m = scene.original          # the views as written (the working views keep their names and masks)
    items = [_item(what, detail) for what, detail in m.assumed]
    if scene.up.estimated:
        items.append(_item("up axis", scene.up.detail + "; model.glb stands on it"))
    if scene.mesh.uv_generated:
        items.append(_item("UV atlas", "the mesh has no UVs: an atlas was made with xatlas, and model.glb and "
                           "model.obj carry the new UVs"))
    unmasked = [v.name for v in m.views if v.mask is None]
    if unmasked:
        one = len(unmasked) == 1
        items.append(_item("masks", f"{len(unmasked)} of {len(m.views)} views {'has' if one else 'have'} no mask "
                           f"({_names(unmasked)}): the mesh's own outline stands for the object there, so "
                           f"{'that photo gives' if one else 'those photos give'} the diagnosis no silhouette "
                           "evidence"))
    if not size_was_given:
        items.append(_item("texture size", f"{texture_size} x {texture_size} texels, chosen from how many photo "
                           "pixels fall on the surface"))
    wr = summary.get("working_resolution")
    if isinstance(wr, dict) and (line := _working_resolution(wr)):
        items.append(line)
    return items
