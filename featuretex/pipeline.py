"""The whole run, stage by stage in data-flow order; each stage resumes or skips when it can.

    scene -> working photos -> G-buffers -> baseline bake -> fit -> bake -> export -> diagnose -> score -> report

Every stage takes the run's `RunContext` and the key of its inputs, and records that key, its
seconds and the files it declares through the stage book (`featuretex/stages.py`).
"""

from __future__ import annotations

import dataclasses
import json
import logging
import time
from pathlib import Path

import numpy as np

from featuretex.atomic import atomic_path, remove_partials, write_json
from featuretex.bake.baseline import bake_baseline
from featuretex.bake.neural import bake_model
from featuretex.config import FeaturetexConfig
from featuretex.diagnose.core import diagnose
from featuretex.diagnose.outputs import write_outputs
from featuretex.export.base import declared_outputs, load_exporters
from featuretex.export.gltf import gltf_from_scene
from featuretex.fit.checkpoint import result_knobs
from featuretex.fit.config import check_fit_config
from featuretex.fit.loop import fit_scene
from featuretex.fit.outputs import FitResult
from featuretex.fit.render import render_texel_head, render_view, residual_renderer
from featuretex.inferred import inferred_items
from featuretex.png import write_texture_png
from featuretex.raster.stage import build_gbuffers, gbuffer_files
from featuretex.raster.uvspace import rasterise_uv
from featuretex.run import RunContext
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import Scene, load_scene
from featuretex.scene.locate import resolve_scene_path
from featuretex.scene.manifest import view_file_stem
from featuretex.scoring.heldout import score_methods
from featuretex.stages import StageBook, key_of
from featuretex.threads import job_threads, use_threads
from featuretex.touchup.evidence import grid_fields
from featuretex.working import WorkingPlan, plan_working, working_scene

log = logging.getLogger("featuretex")
HELDOUT_DIR = "heldout"
FIT_FILES = ("model.pt", "history.json", "corrections.npz")


def _save_npz(path: Path, **arrays: np.ndarray) -> None:
    with atomic_path(path) as tmp:
        np.savez_compressed(tmp, **arrays)


def stage_working(ctx: RunContext) -> WorkingPlan:
    """Texture size and per-view working windows (decided once, kept in stages/working.json), then
    the scene with its photos reduced into cache/photos/ (files already there are reused); the
    context's scene becomes that working scene."""
    cfg, scene, tex = ctx.cfg, ctx.scene, ctx.cfg.texture
    record = ctx.stage_file("working.json")

    def compute() -> WorkingPlan:
        plan = plan_working(scene, cfg.photos, tex.size, tex.min_size, tex.max_size, cfg.raster.backend,
                            quiet=cfg.quiet)
        write_json(record, plan.to_json())
        return plan

    key = key_of(scene.content_hash, cfg.photos, tex.size, tex.min_size, tex.max_size, cfg.raster.backend)
    plan = ctx.book.run("working", key, [record], compute,
                        lambda: WorkingPlan.from_json(json.loads(record.read_text())))

    def photos() -> tuple[Scene, bool]:
        working, written = working_scene(scene, plan, ctx.out / "cache" / "photos", quiet=cfg.quiet)
        return working, written > 0

    ctx.scene = ctx.book.run_cached("photos", key, photos, _photo_files)
    return plan


def _photo_files(scene: Scene) -> list[Path]:
    return [p for v in scene.views for p in (v.image, v.mask) if p is not None]


def stage_gbuffers(ctx: RunContext, key: str) -> None:
    """Cached on disk by mesh + camera content: cheap on a re-run, whatever else changed."""
    cache, backend = ctx.out / "cache" / "gbuffer", ctx.cfg.raster.backend

    def compute():
        gbuffers, rendered = build_gbuffers(ctx.scene, cache, backend, quiet=ctx.cfg.quiet)
        return gbuffers, rendered > 0

    ctx.gbuffers = ctx.book.run_cached("gbuffer", key, compute, lambda _: gbuffer_files(ctx.scene, cache, backend))


def stage_baseline(ctx: RunContext, key: str) -> tuple[np.ndarray, np.ndarray]:
    cfg, out = ctx.cfg, ctx.out
    npz = ctx.stage_file("baseline.npz")

    def compute():
        b = bake_baseline(ctx.scene, ctx.gbuffers, ctx.texels,
                          dataclasses.replace(cfg.baseline, gutter=cfg.texture.gutter))
        write_texture_png(out / "baseline_texture.png", linear_to_srgb(b.texture_lin))
        _save_npz(npz, texture_lin=b.texture_lin, seen=b.seen)
        return b.texture_lin, b.seen

    def load():
        z = np.load(npz)
        return z["texture_lin"], z["seen"]

    return ctx.book.run("baseline", key, [npz, out / "baseline_texture.png"], compute, load)


def stage_fit(ctx: RunContext, key: str, base_tex: np.ndarray, base_seen: np.ndarray) -> FitResult:
    """The fit resumes from its checkpoint, or loads fit/model.pt when it already finished; its time
    is the fit's own (earlier sessions of a resumed fit included)."""
    cfg = ctx.cfg

    def compute() -> tuple[FitResult, bool]:
        fit_cfg = dataclasses.replace(cfg.fit, gutter=cfg.texture.gutter)
        fit = fit_scene(ctx.scene, ctx.gbuffers, base_tex, base_seen, fit_cfg, ctx.out, seed=cfg.seed,
                        quiet=cfg.quiet, config_hash=key)
        return fit, not fit.loaded

    t0 = time.perf_counter()
    return ctx.book.run_cached("fit", key, compute, lambda _: [ctx.out / "fit" / f for f in FIT_FILES],
                               seconds=lambda fit: float(fit.timings.get("fit_s", time.perf_counter() - t0)))


def stage_bake(ctx: RunContext, key: str, model) -> np.ndarray:
    cfg = ctx.cfg
    npz = ctx.stage_file("bake.npz")
    png = ctx.out / "texture.png"

    def compute():
        r = bake_model(ctx.scene, ctx.gbuffers, ctx.texels, render_texel_head(model, ctx.texels.size),
                       residual_renderer(model, ctx.scene, ctx.gbuffers),
                       dataclasses.replace(cfg.bake, gutter=cfg.texture.gutter))
        write_texture_png(png, linear_to_srgb(r.texture_lin), bits=cfg.texture.bits)
        _save_npz(npz, texture_lin=r.texture_lin, seen=r.seen)
        return r.texture_lin

    return ctx.book.run("bake", key, [npz, png], compute, lambda: np.load(npz)["texture_lin"])


def output_frame(scene: Scene) -> np.ndarray:
    """(4, 4) scene -> glTF matrix: metres, the scene's up along +Y."""
    return gltf_from_scene(scene.up.vector, scene.manifest.unit_m)


def stage_export(ctx: RunContext, key: str) -> list[Path]:
    """Every configured exporter; the stage is done when every file they declare exists."""
    out, cfg = ctx.out, ctx.cfg
    exporters = load_exporters(cfg.export.formats)
    files = declared_outputs(exporters, out, out / "texture.png")
    frame = output_frame(ctx.scene)

    def compute():
        written: list[Path] = []
        for ex in exporters:
            written += ex.export(out, ctx.scene.mesh, out / "texture.png", unlit=cfg.export.unlit,
                                 gltf_from_scene=frame)
        return written

    return ctx.book.run("export", key, files, compute, lambda: files)


def stage_diagnose(ctx: RunContext, key: str, texture_lin: np.ndarray, fit: FitResult) -> dict:
    out = ctx.out
    record = ctx.stage_file("diagnosis.json")
    grid = ctx.stage_file("diagnosis_grid.npz")     # the working-grid fields the touch-up starts from

    def compute():
        dg = diagnose(ctx.scene, ctx.gbuffers, ctx.texels, texture_lin, ctx.cfg.diagnose,
                      corrections=fit.corrections, history=fit.history)
        write_outputs(out, dg, ctx.scene, ctx.texels)
        _save_npz(grid, **grid_fields(dg.work))
        fields = dg.summary_fields()
        fields["figures"] = _jsonable(dg.figures)
        write_json(record, fields)
        return fields

    artefacts = [record, grid, out / "error_map.png", out / "error_map.npz", out / "diagnosis.ply"]
    return ctx.book.run("diagnose", key, artefacts, compute, lambda: json.loads(record.read_text()))


def stage_score(ctx: RunContext, key: str, base_tex: np.ndarray, model, baked_tex: np.ndarray) -> dict:
    """Held-out figures of the three methods (kept in stages/score.json); renders go to
    `out/heldout/` for the report and are the stage's declared files."""
    record = ctx.stage_file("score.json")

    def compute() -> dict:
        heldout = score_methods(ctx.scene, ctx.gbuffers, base_tex,
                                lambda v: render_view(model, ctx.scene, ctx.gbuffers[v.name], v),
                                baked_tex, ctx.out / HELDOUT_DIR, ctx.cfg.seed)
        write_json(record, heldout)
        return heldout

    return ctx.book.run("score", key, [record], compute, lambda: json.loads(record.read_text()),
                        produced=lambda heldout: heldout_files(ctx.out, heldout))


def heldout_files(out: Path, heldout: dict) -> list[Path]:
    """The renders score_method wrote: per method, each scored view's render and its photo."""
    files = []
    for method in ("baseline", "neural", "baked"):
        for view in heldout[method].get("per_view", {}):
            stem = view_file_stem(view)
            files += [out / HELDOUT_DIR / f"{stem}_{method}.png", out / HELDOUT_DIR / f"{stem}_photo.png"]
    return list(dict.fromkeys(files))


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
    ctx = RunContext(scene=scene, cfg=cfg, out=out, book=StageBook(out))
    book = ctx.book
    plan = stage_working(ctx)
    size = plan.texture_size
    scene_key = key_of(ctx.scene.content_hash)

    stage_gbuffers(ctx, scene_key)
    ctx.texels = rasterise_uv(ctx.scene.mesh, size)

    base_key = key_of(scene_key, size, cfg.baseline, cfg.texture.gutter)
    base_tex, base_seen = stage_baseline(ctx, base_key)
    fit_key = key_of(base_key, result_knobs(cfg.fit), cfg.seed)
    fit = stage_fit(ctx, fit_key, base_tex, base_seen)
    bake_key = key_of(fit_key, cfg.bake, cfg.texture)
    baked_tex = stage_bake(ctx, bake_key, fit.model)
    stage_export(ctx, key_of(bake_key, cfg.export, output_frame(ctx.scene).tolist()))
    diag = stage_diagnose(ctx, key_of(bake_key, cfg.diagnose), baked_tex, fit)
    heldout = stage_score(ctx, key_of(bake_key, cfg.seed), base_tex, fit.model, baked_tex)
    if cfg.touchup:
        from featuretex.touchup.stage import stage_touchup

        with np.load(ctx.stage_file("diagnosis_grid.npz")) as z:
            grid = {k: z[k] for k in z.files}
        tu = stage_touchup(ctx, key_of(bake_key, cfg.diagnose, cfg.touchup_settings), fit, baked_tex, diag, grid,
                           output_frame(ctx.scene))
        heldout["touchup"], heldout["touchup_report"] = tu["heldout"], tu["report"]
        book.timings["touchup"] = tu["seconds"]

    summary = build_summary(ctx.scene, cfg, plan, heldout, diag, fit, book, time.perf_counter() - t_start)
    summary["inferred"] = inferred_items(ctx.scene, plan.texture_size, bool(cfg.texture.size), summary)
    summary["warnings"] = list(ctx.scene.warnings)
    write_json(out / "summary.json", summary)
    if cfg.report:
        from featuretex.report.html import write_report

        t0 = time.perf_counter()
        write_report(out)
        summary["timings_s"]["report"] = round(time.perf_counter() - t0, 3)
        write_json(out / "summary.json", summary)
    return summary


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
