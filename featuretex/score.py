"""Held-out scoring: render each method at every held-out view and compare with the photo."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from featuretex import metrics
from featuretex.export.png import write_texture_png
from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View, view_file_stem


def score_mask(scene: Scene, view: View, gbuf: GBuffer) -> np.ndarray:
    """(H, W) bool: G-buffer coverage ∩ photo mask (docs/contracts.md, section 4)."""
    m = np.array(gbuf.coverage)
    pm = scene.photo_mask(view)
    return m & pm if pm is not None else m


def score_method(scene: Scene, gbuffers: dict[str, GBuffer], renders: dict[str, np.ndarray],
                 image_dir: Path | None = None, method: str = "") -> dict:
    """{"psnr", "ssim", "psnr_gaincomp", "psnr_tolerant", "per_view": {view: {...}}} over held-out views.

    renders: view name -> (H, W, 3) float32 linear render. With image_dir, writes
    `<view>_<method>.png` (sRGB) beside `<view>_photo.png` for the report.
    """
    per_view, weights = {}, []
    for view in scene.manifest.heldout:
        gb = gbuffers[view.name]
        mask = score_mask(scene, view, gb)
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
