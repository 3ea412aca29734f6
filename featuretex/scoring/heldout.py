"""Held-out scoring of a method: its renders at every held-out view against the photos, and of a
baked texture: those scores, the gap to the neural render and how visible its UV seams are."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np

from featuretex.png import write_texture_png
from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View, view_file_stem
from featuretex.scoring import metrics
from featuretex.scoring.render import render_texture
from featuretex.scoring.seams import seam_ratio
from featuretex.texels.visibility import usable_mask


def score_method(scene: Scene, gbuffers: dict[str, GBuffer], renders: dict[str, np.ndarray],
                 image_dir: Path | None = None, method: str = "") -> dict:
    """{"psnr", "ssim", "psnr_gaincomp", "psnr_tolerant", "per_view": {view: {...}}} over held-out views.

    renders: view name -> (H, W, 3) float32 linear render. With image_dir, writes
    `<view>_<method>.png` (sRGB) beside `<view>_photo.png` for the report.
    """
    per_view, weights = {}, []
    for view in scene.manifest.heldout:
        gb = gbuffers[view.name]
        mask = usable_mask(scene, view, gb)
        if not mask.any():  # the view does not show the object: nothing to score
            continue
        photo = scene.photo(view)
        s = metrics.score_view(renders[view.name], photo, mask)
        per_view[view.name] = s
        weights.append(int(mask.sum()))
        if image_dir is not None:
            write_texture_png(image_dir / f"{view_file_stem(view.name)}_{method}.png",
                              np.where(mask[..., None], linear_to_srgb(renders[view.name]), 0.0))
            photo_png = image_dir / f"{view_file_stem(view.name)}_photo.png"
            if not photo_png.exists():
                write_texture_png(photo_png, linear_to_srgb(photo))
    if not per_view:
        return {"psnr": None, "ssim": None, "psnr_gaincomp": None, "psnr_tolerant": None, "per_view": {}}
    agg = metrics.aggregate(list(per_view.values()), weights)
    agg["per_view"] = per_view
    return agg


def score_bake(scene: Scene, gbuffers: dict[str, GBuffer], texture_lin: np.ndarray, neural: dict | None = None,
               image_dir: Path | None = None, seed: int = 0) -> dict:
    """Held-out figures of a baked texture, for summary.json.

    texture_lin: (T, T, 3) linear. neural: the `score_method` result of the neural render (for the
    gap). Returns {"baked": score_method(...) incl. per_view, "bake_gap_db": neural - baked in
    alignment-tolerant PSNR (None without neural scores), "seams": seam_ratio(...) at held-out views,
    with the photos' own ratio as the reference level}.
    """
    held = list(scene.manifest.heldout)
    renders = {v.name: render_texture(gbuffers[v.name], scene.mesh, texture_lin) for v in held}
    baked = score_method(scene, gbuffers, renders, image_dir, "baked")
    gap = None
    if neural is not None and neural.get("psnr_tolerant") is not None and baked["psnr_tolerant"] is not None:
        gap = float(neural["psnr_tolerant"] - baked["psnr_tolerant"])
    masks = {v.name: usable_mask(scene, v, gbuffers[v.name]) for v in held}
    photos = {v.name: scene.photo(v) for v in held}
    seams = seam_ratio(scene.mesh, gbuffers, renders, held, masks, seed=seed, photos=photos)
    return {"baked": baked, "bake_gap_db": gap, "seams": seams}


def score_methods(scene: Scene, gbuffers: dict[str, GBuffer], baseline_lin: np.ndarray,
                  neural_render: Callable[[View], np.ndarray], baked_lin: np.ndarray, image_dir: Path | None,
                  seed: int = 0) -> dict:
    """Held-out figures of the three methods, the score stage's entry point: the classical bake
    `baseline_lin` and the baked texture `baked_lin` ((T, T, 3) linear) rendered here, the fitted
    model through `neural_render` (view -> (H, W, 3) linear, the fit's renderer). With image_dir,
    the renders go there for the report. Returns {"baseline", "neural", "baked": score_method(...),
    "bake_gap_db", "seams": as score_bake}."""
    held = scene.manifest.heldout
    base = score_method(scene, gbuffers, {v.name: render_texture(gbuffers[v.name], scene.mesh, baseline_lin)
                                          for v in held}, image_dir, "baseline")
    neural = score_method(scene, gbuffers, {v.name: neural_render(v) for v in held}, image_dir, "neural")
    baked = score_bake(scene, gbuffers, baked_lin, neural, image_dir, seed)
    return {"baseline": base, "neural": neural, "baked": baked["baked"], "bake_gap_db": baked["bake_gap_db"],
            "seams": baked["seams"]}
