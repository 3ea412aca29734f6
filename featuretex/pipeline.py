"""The whole run, stage by stage in data-flow order; each stage resumes or skips when it can.

    scene -> working photos -> G-buffers -> baseline bake -> fit -> bake -> export -> diagnose -> score -> report
"""

from __future__ import annotations

import dataclasses
import json
import logging
import time
from pathlib import Path

import numpy as np

from featuretex import plugins
from featuretex.atomic import atomic_path, remove_partials, write_json
from featuretex.bake.baseline import bake_baseline
from featuretex.bake.neural import bake_model, score_bake
from featuretex.config import FeaturetexConfig
from featuretex.diagnose.core import diagnose
from featuretex.diagnose.outputs import write_outputs
from featuretex.export.gltf import gltf_from_scene
from featuretex.export.png import write_texture_png
from featuretex.fit.checkpoint import result_knobs
from featuretex.fit.config import check_fit_config
from featuretex.fit.loop import fit_scene
from featuretex.fit.render import render_view
from featuretex.inferred import inferred_items
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.stage import build_gbuffers
from featuretex.raster.uvspace import TexelBuffer, rasterise_uv
from featuretex.render import render_texture
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import Scene, load_scene
from featuretex.scene.locate import resolve_scene_path
from featuretex.score import score_method
from featuretex.stages import StageBook, key_of
from featuretex.threads import job_threads, use_threads
from featuretex.touchup.evidence import grid_fields
from featuretex.working import WorkingPlan, plan_working, working_scene

log = logging.getLogger("featuretex")
HELDOUT_DIR = "heldout"


def _save_npz(path: Path, **arrays: np.ndarray) -> None:
    with atomic_path(path) as tmp:
        np.savez_compressed(tmp, **arrays)


def stage_working(scene: Scene, cfg: FeaturetexConfig, out: Path, book: StageBook) -> tuple[Scene, WorkingPlan]:
    """Texture size and per-view working windows (decided once, kept in stages/working.json), then
    the scene with its photos reduced into cache/photos/ (files already there are reused)."""
    t0 = time.perf_counter()
    record = out / "stages" / "working.json"
    tex = cfg.texture

    def compute() -> WorkingPlan:
        plan = plan_working(scene, cfg.photos, tex.size, tex.min_size, tex.max_size, cfg.raster.backend,
                            quiet=cfg.quiet)
        write_json(record, plan.to_json())
        return plan

    key = key_of(scene.content_hash, cfg.photos, tex.size, tex.min_size, tex.max_size, cfg.raster.backend)
    plan = book.run("working", key, [record], compute, lambda: WorkingPlan.from_json(json.loads(record.read_text())))
    working, written = working_scene(scene, plan, out / "cache" / "photos", quiet=cfg.quiet)
    if written == 0 and "photos" in book.records:
        book.timings["photos"] = book.records["photos"]["seconds"]
    else:
        book.timings["photos"] = round(time.perf_counter() - t0, 3)
        book.records["photos"] = {"key": key, "seconds": book.timings["photos"]}
    return working, plan


def stage_gbuffers(scene: Scene, cfg: FeaturetexConfig, out: Path, book: StageBook, scene_key: str
                   ) -> dict[str, GBuffer]:
    """Cached on disk by mesh + camera content: cheap on a re-run, whatever else changed."""
    t0 = time.perf_counter()
    gbuffers, rendered = build_gbuffers(scene, out / "cache" / "gbuffer", cfg.raster.backend, quiet=cfg.quiet)
    if rendered == 0 and "gbuffer" in book.records:
        book.timings["gbuffer"] = book.records["gbuffer"]["seconds"]
    else:
        book.timings["gbuffer"] = round(time.perf_counter() - t0, 3)
        book.records["gbuffer"] = {"key": scene_key, "seconds": book.timings["gbuffer"]}
    return gbuffers


def stage_baseline(scene: Scene, gbuffers, texels: TexelBuffer, cfg: FeaturetexConfig, out: Path,
                   book: StageBook, key: str) -> tuple[np.ndarray, np.ndarray]:
    npz = out / "stages" / "baseline.npz"

    def compute():
        b = bake_baseline(scene, gbuffers, texels, dataclasses.replace(cfg.baseline, gutter=cfg.texture.gutter))
        write_texture_png(out / "baseline_texture.png", linear_to_srgb(b.texture_lin))
        _save_npz(npz, texture_lin=b.texture_lin, seen=b.seen)
        return b.texture_lin, b.seen

    def load():
        z = np.load(npz)
        return z["texture_lin"], z["seen"]

    return book.run("baseline", key, [npz, out / "baseline_texture.png"], compute, load)


def stage_bake(scene: Scene, gbuffers, texels: TexelBuffer, model, cfg: FeaturetexConfig, out: Path,
               book: StageBook, key: str) -> np.ndarray:
    npz = out / "stages" / "bake.npz"
    png = out / "texture.png"

    def compute():
        r = bake_model(scene, gbuffers, texels, model, dataclasses.replace(cfg.bake, gutter=cfg.texture.gutter))
        write_texture_png(png, linear_to_srgb(r.texture_lin), bits=cfg.texture.bits)
        _save_npz(npz, texture_lin=r.texture_lin, seen=r.seen)
        return r.texture_lin

    return book.run("bake", key, [npz, png], compute, lambda: np.load(npz)["texture_lin"])


def output_frame(scene: Scene) -> np.ndarray:
    """(4, 4) scene -> glTF matrix: metres, the scene's up along +Y."""
    return gltf_from_scene(scene.up.vector, scene.manifest.unit_m)


def stage_export(scene: Scene, cfg: FeaturetexConfig, out: Path, book: StageBook, key: str) -> list[Path]:
    exporters = [plugins.load("exporters", name)() for name in cfg.export.formats]
    files = [out / "model.glb"] if "glb" in cfg.export.formats else []
    frame = output_frame(scene)

    def compute():
        written: list[Path] = []
        for ex in exporters:
            written += ex.export(out, scene.mesh, out / "texture.png", unlit=cfg.export.unlit,
                                 gltf_from_scene=frame)
        return written

    return book.run("export", key, files, compute, lambda: files)


def stage_diagnose(scene: Scene, gbuffers, texels: TexelBuffer, texture_lin: np.ndarray, fit, cfg: FeaturetexConfig,
                   out: Path, book: StageBook, key: str) -> dict:
    record = out / "stages" / "diagnosis.json"
    grid = out / "stages" / "diagnosis_grid.npz"     # the working-grid fields the touch-up starts from

    def compute():
        dg = diagnose(scene, gbuffers, texels, texture_lin, cfg.diagnose, corrections=fit.corrections,
                      history=fit.history)
        write_outputs(out, dg, scene, texels)
        _save_npz(grid, **grid_fields(dg.work))
        fields = dg.summary_fields()
        fields["figures"] = _jsonable(dg.figures)
        write_json(record, fields)
        return fields

    artefacts = [record, grid, out / "error_map.png", out / "error_map.npz", out / "diagnosis.ply"]
    return book.run("diagnose", key, artefacts, compute, lambda: json.loads(record.read_text()))


def _jsonable(obj):
    """Figures may hold numpy scalars or NaN; JSON takes neither."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        return float(obj) if np.isfinite(obj) else None
    if isinstance(obj, np.integer):
        return int(obj)
    return obj


def run_pipeline(cfg: FeaturetexConfig, out: Path) -> dict:
    """Run every stage for one scene into `out`; return the summary written to summary.json."""
    t_start = time.perf_counter()
    check_fit_config(cfg.fit)   # before any stage runs
    use_threads(cfg.fit.threads or job_threads())   # side by side in a batch, each run takes its share
    scene = load_scene(resolve_scene_path(cfg.scene))
    out.mkdir(parents=True, exist_ok=True)
    for leftover in remove_partials(out):  # a killed run's temporary files; never a finished output
        log.info("removed %s, left by an interrupted write", leftover)
    book = StageBook(out)
    scene, plan = stage_working(scene, cfg, out, book)
    size = plan.texture_size
    scene_key = key_of(scene.content_hash)

    gbuffers = stage_gbuffers(scene, cfg, out, book, scene_key)
    texels = rasterise_uv(scene.mesh, size)

    base_key = key_of(scene_key, size, cfg.baseline, cfg.texture.gutter)
    base_tex, base_seen = stage_baseline(scene, gbuffers, texels, cfg, out, book, base_key)

    # the fit resumes from its checkpoint, or loads fit/model.pt when it already finished
    fit_key = key_of(base_key, result_knobs(cfg.fit), cfg.seed)
    t0 = time.perf_counter()
    fit = fit_scene(scene, gbuffers, base_tex, base_seen, cfg.fit, out, seed=cfg.seed, quiet=cfg.quiet,
                    config_hash=fit_key)
    if fit.loaded and "fit" in book.records:
        book.timings["fit"] = book.records["fit"]["seconds"]
    else:
        book.timings["fit"] = round(float(fit.timings.get("fit_s", time.perf_counter() - t0)), 3)
        book.records["fit"] = {"key": fit_key, "seconds": book.timings["fit"]}
        write_json(book.path, book.records)

    bake_key = key_of(fit_key, cfg.bake, cfg.texture)
    baked_tex = stage_bake(scene, gbuffers, texels, fit.model, cfg, out, book, bake_key)
    stage_export(scene, cfg, out, book, key_of(bake_key, cfg.export, output_frame(scene).tolist()))
    diag = stage_diagnose(scene, gbuffers, texels, baked_tex, fit, cfg, out, book,
                          key_of(bake_key, cfg.diagnose))

    t0 = time.perf_counter()
    heldout = score_all(scene, gbuffers, base_tex, fit.model, baked_tex, out, cfg.seed)
    book.timings["score"] = round(time.perf_counter() - t0, 3)
    if cfg.touchup:
        from featuretex.touchup.stage import stage_touchup

        with np.load(out / "stages" / "diagnosis_grid.npz") as z:
            grid = {k: z[k] for k in z.files}
        tu = stage_touchup(scene, cfg, out, book, key_of(bake_key, cfg.diagnose, cfg.touchup_settings), size,
                           gbuffers, fit, baked_tex, diag, grid, output_frame(scene))
        heldout["touchup"], heldout["touchup_report"] = tu["heldout"], tu["report"]
        book.timings["touchup"] = tu["seconds"]

    summary = build_summary(scene, cfg, plan, heldout, diag, fit, book, time.perf_counter() - t_start)
    summary["inferred"] = inferred_items(scene, plan.texture_size, bool(cfg.texture.size), summary)
    summary["warnings"] = list(scene.warnings)
    write_json(out / "summary.json", summary)
    if cfg.report:
        from featuretex.report.html import write_report

        t0 = time.perf_counter()
        write_report(out)
        summary["timings_s"]["report"] = round(time.perf_counter() - t0, 3)
        write_json(out / "summary.json", summary)
    return summary


def score_all(scene: Scene, gbuffers, base_tex: np.ndarray, model, baked_tex: np.ndarray, out: Path,
              seed: int) -> dict:
    """Held-out figures of the three methods; renders go to `out/heldout/` for the report."""
    image_dir = out / HELDOUT_DIR
    held = scene.manifest.heldout
    base = score_method(scene, gbuffers, {v.name: render_texture(gbuffers[v.name], scene.mesh, base_tex)
                                          for v in held}, image_dir, "baseline")
    neural = score_method(scene, gbuffers, {v.name: render_view(model, scene, gbuffers[v.name], v)
                                            for v in held}, image_dir, "neural")
    baked = score_bake(scene, gbuffers, baked_tex, neural, image_dir, seed)
    return {"baseline": base, "neural": neural, "baked": baked["baked"], "bake_gap_db": baked["bake_gap_db"],
            "seams": baked["seams"]}


def _strip(d: dict) -> dict:
    return {k: v for k, v in d.items() if k != "per_view"}


def build_summary(scene: Scene, cfg: FeaturetexConfig, plan: WorkingPlan, heldout: dict, diag: dict, fit,
                  book: StageBook, total_s: float) -> dict:
    m = scene.manifest
    methods = ("baseline", "baked", "neural") + (("touchup",) if "touchup" in heldout else ())
    hist = fit.history or {}
    summary = {
        "verdict": diag["verdict"],
        "reasons": diag["reasons"],
        "heldout": {k: _strip(heldout[k]) for k in methods},
        "areas": diag["areas"],
        "regions": diag.get("regions", []),
        "payoff_db": diag.get("payoff_db", {}),
        "timings_s": {**{k: book.timings.get(k) for k in ("photos", "gbuffer", "baseline", "fit", "bake", "export",
                                                          "diagnose", "score")},
                      **({"touchup": book.timings["touchup"]} if "touchup" in book.timings else {}),
                      "total": round(total_s, 3)},
        "bake_gap_db": heldout["bake_gap_db"],
        "gain_db": {
            "neural_tolerant_vs_baseline": _diff(heldout["neural"], heldout["baseline"], "psnr_tolerant"),
            "baked_tolerant_vs_baseline": _diff(heldout["baked"], heldout["baseline"], "psnr_tolerant"),
            "baked_plain_vs_baseline": _diff(heldout["baked"], heldout["baseline"], "psnr"),
        },
        "seams": heldout["seams"],
        "heldout_per_view": {k: heldout[k].get("per_view", {}) for k in methods},
        "diagnosis": diag.get("figures", {}),
        "fit": {"steps": hist.get("steps_done", None), "stopped": fit.stopped},
        "scene": str(m.path),
        "unit": m.unit,
        "up": scene.up.as_list(),
        "gltf_from_scene": output_frame(scene).tolist(),
        "texture_size": plan.texture_size,
        "working_resolution": plan.summary(),
        "views": {"fitted": len(m.fitted), "heldout": len(m.heldout)},
        "seed": cfg.seed,
    }
    if "touchup" in heldout:
        summary["touchup"] = heldout["touchup_report"]
        summary["gain_db"].update(touchup_plain_vs_baseline=_diff(heldout["touchup"], heldout["baseline"], "psnr"),
                                  touchup_plain_vs_baked=_diff(heldout["touchup"], heldout["baked"], "psnr"),
                                  touchup_tolerant_vs_baseline=_diff(heldout["touchup"], heldout["baseline"],
                                                                     "psnr_tolerant"))
    return summary


def _diff(a: dict, b: dict, key: str) -> float | None:
    if a.get(key) is None or b.get(key) is None:
        return None
    return round(float(a[key] - b[key]), 4)
