"""The whole run, stage by stage in data-flow order; each stage resumes or skips when it can."""

from __future__ import annotations

import logging
import time
from pathlib import Path

import numpy as np

from featuretex.atomic import atomic_path, write_json
from featuretex.bake.baseline import bake_baseline
from featuretex.bake.texel_size import auto_texture_size
from featuretex.config import FeaturetexConfig
from featuretex.export.png import write_texture_png
from featuretex.raster.stage import build_gbuffers
from featuretex.raster.uvspace import rasterise_uv
from featuretex.render import render_texture
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import Scene, load_scene
from featuretex.score import score_method
from featuretex.stages import StageBook, key_of

log = logging.getLogger("featuretex")


def resolve_scene_path(scene: str) -> Path:
    if scene == "demo":
        from featuretex.demo import ensure_demo_scene

        return ensure_demo_scene()
    return Path(scene).expanduser()


def run_pipeline(cfg: FeaturetexConfig, out: Path) -> dict:
    """Run every stage for one scene into `out`; return the summary written to summary.json."""
    t_start = time.perf_counter()
    scene = load_scene(resolve_scene_path(cfg.scene))
    out.mkdir(parents=True, exist_ok=True)
    book = StageBook(out)
    scene_key = key_of(scene.content_hash)

    # G-buffers: cached on disk by mesh + camera content, so this stage is cheap on a re-run
    t0 = time.perf_counter()
    gbuffers, rendered = build_gbuffers(scene, out / "cache" / "gbuffer", cfg.raster.backend, quiet=cfg.quiet)
    book.timings["gbuffer"] = round(time.perf_counter() - t0, 3)
    if rendered == 0 and "gbuffer" in book.records:
        book.timings["gbuffer"] = book.records["gbuffer"]["seconds"]
    else:
        book.records["gbuffer"] = {"key": scene_key, "seconds": book.timings["gbuffer"]}

    size = cfg.texture.size or auto_texture_size(scene, gbuffers, min_size=cfg.texture.min_size,
                                                 max_size=cfg.texture.max_size)
    texels = rasterise_uv(scene.mesh, size)

    # classical baseline bake
    base_key = key_of(scene_key, size, cfg.baseline, cfg.texture.gutter)
    base_npz = out / "stages" / "baseline.npz"

    def compute_baseline():
        b = bake_baseline(scene, gbuffers, texels, cfg.baseline)
        write_texture_png(out / "baseline_texture.png", linear_to_srgb(b.texture_lin))
        with atomic_path(base_npz) as tmp:
            np.savez_compressed(tmp, texture_lin=b.texture_lin, seen=b.seen)
        return b.texture_lin, b.seen

    def load_baseline():
        z = np.load(base_npz)
        return z["texture_lin"], z["seen"]

    base_tex, base_seen = book.run("baseline", base_key, [base_npz, out / "baseline_texture.png"],
                                   compute_baseline, load_baseline)

    heldout_dir = out / "heldout"
    renders = {v.name: render_texture(gbuffers[v.name], scene.mesh, base_tex) for v in scene.manifest.heldout}
    heldout = {"baseline": score_method(scene, gbuffers, renders, heldout_dir, "baseline")}

    summary = build_summary(scene, cfg, size, heldout, book, time.perf_counter() - t_start)
    write_json(out / "summary.json", summary)
    return summary


def build_summary(scene: Scene, cfg: FeaturetexConfig, size: int, heldout: dict, book: StageBook,
                  total_s: float) -> dict:
    m = scene.manifest
    return {
        "scene": str(m.path),
        "unit": m.unit,
        "texture_size": size,
        "views": {"fitted": len(m.fitted), "heldout": len(m.heldout)},
        "heldout": {k: {kk: vv for kk, vv in v.items() if kk != "per_view"} for k, v in heldout.items()},
        "heldout_per_view": {k: v.get("per_view", {}) for k, v in heldout.items()},
        "timings_s": {**book.timings, "total": round(total_s, 3)},
        "seed": cfg.seed,
    }
