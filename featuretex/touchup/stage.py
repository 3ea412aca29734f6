"""The touch-up stage: rounds of move -> re-rasterise -> warm re-fit -> re-bake -> re-diagnose.

Round k starts from the mesh, model, bake and diagnosis of round k - 1 (round 0: the run's own).
It solves offsets from that diagnosis's evidence (featuretex.touchup.evidence / solve), moves the
surface, renders the moved mesh's G-buffers (cached by content like any others), re-fits from the
current model for `fit_steps` steps (same UVs, so texture, decoder and corrections carry over),
bakes and diagnoses again. The round is kept while the fitted views' evidence improves: the
leave-one-out squared error of the views (featuretex.diagnose.payoff) over the surface that may
move must fall by `min_gain_db` at least. Held-out photos never enter any of it.

Each round's state is saved in `touchup/round<k>/` (the re-fit checkpoints there too) and booked
in stages.json, so a killed touch-up resumes at the round it was in.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from featuretex.atomic import atomic_path, write_json
from featuretex.bake.neural import bake_model
from featuretex.diagnose.core import diagnose
from featuretex.diagnose.grid import texel_areas
from featuretex.fit.loop import fit_scene
from featuretex.fit.outputs import FitResult
from featuretex.fit.render import render_texel_head, residual_renderer
from featuretex.raster.stage import build_gbuffers
from featuretex.raster.uvspace import rasterise_uv
from featuretex.scene.loaded import Scene
from featuretex.scene.mesh import SceneMesh, smooth_normals
from featuretex.scoring.heldout import score_method
from featuretex.scoring.render import render_texture
from featuretex.stages import StageBook, key_of
from featuretex.touchup import evidence as E
from featuretex.touchup.config import TouchupConfig
from featuretex.touchup.mesh import moved, welded
from featuretex.touchup.outputs import model_files, write_model, write_offsets_ply
from featuretex.touchup.solve import solve_offsets

if TYPE_CHECKING:        # the run context is built by the pipeline, a later layer
    from featuretex.run import RunContext

log = logging.getLogger("featuretex")
DIR = "touchup"


@dataclass
class RoundState:
    """Where a round left the scan."""

    k: int
    mesh: SceneMesh
    offset: np.ndarray            # (V,) float64 total offset along the scan's own normals, scene units
    texture_lin: np.ndarray       # (T, T, 3) float32 the bake on this mesh
    fields: dict[str, np.ndarray]  # the diagnosis's working-grid fields (featuretex.touchup.evidence)
    summary: dict                 # the diagnosis's summary fields and figures
    fit: FitResult | None = None
    gbuffers: dict = field(default_factory=dict)
    kept: bool = True
    moved_vertices: int = 0


def size_of(mesh: SceneMesh) -> float:
    return mesh.extent


def lengths(cfg: TouchupConfig, size: float) -> tuple[float, float, float]:
    """(smoothing length, margin, robust scale) in scene units."""
    smooth = cfg.smooth_units if cfg.smooth_units > 0 else cfg.smooth_fraction * size
    margin = cfg.margin_units if cfg.margin_units > 0 else cfg.margin_fraction * size
    return smooth, margin, cfg.robust_fraction * size


def movable_error(fields: dict[str, np.ndarray], movable: np.ndarray) -> float:
    """Leave-one-out MSE of the fitted views over the `movable` texels (NaN when none is judged)."""
    se, px = fields["loo_se"][movable], fields["loo_px"][movable]
    return float(se.sum() / px.sum()) if px.sum() > 0 else float("nan")


def solve_round(prev: RoundState, scene: Scene, cfg: TouchupConfig, diag_cfg, half_range: float
                ) -> tuple[SceneMesh, np.ndarray, np.ndarray, int]:
    """(moved mesh, new total offset (V,), movable texels (D, D), vertices moved) for the next round."""
    mesh = prev.mesh
    D = prev.fields["cls"].shape[0]
    grid = rasterise_uv(mesh, D)
    smooth, margin, robust = lengths(cfg, size_of(scene.mesh))
    cell = math.sqrt(max(float(np.median(texel_areas(mesh, grid)[grid.valid])), 1e-30))
    w = welded(mesh)
    setup = E.build(mesh, grid, prev.fields, texel_areas(mesh, grid), w.inverse, len(w.vertices),
                    margin_texels=int(math.ceil(margin / max(cell, 1e-30))), min_views=diag_cfg.min_views,
                    fine_weight=cfg.fine_weight)
    if not len(setup.evidence.face) or setup.pinned.all():
        return mesh, prev.offset, setup.movable, 0
    sol = solve_offsets(w.vertices, w.faces, setup.evidence, setup.pinned, length=smooth,
                        laplacian=cfg.laplacian, robust_scale=robust, limit=half_range)
    # never beyond the sweep range in total: the diagnosis measured nothing further out
    total_w = np.zeros(len(w.vertices))
    total_w[w.inverse] = prev.offset
    step = np.clip(total_w + sol.offset, -half_range, half_range) - total_w
    step[setup.pinned] = 0.0
    n = int((np.abs(step) > 0).sum())
    return moved(mesh, w, step), prev.offset + step[w.inverse], setup.movable, n


def save_round(folder: Path, st: RoundState) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    with atomic_path(folder / "state.npz") as tmp:
        np.savez_compressed(tmp, vertices=st.mesh.vertices, offset=st.offset, texture_lin=st.texture_lin,
                            **{f"field_{k}": v for k, v in st.fields.items()})
    write_json(folder / "state.json", {"summary": st.summary, "kept": st.kept, "moved_vertices": st.moved_vertices})


def load_round(folder: Path, k: int, base: SceneMesh) -> RoundState:
    with np.load(folder / "state.npz") as z:
        v = z["vertices"]
        mesh = dataclasses.replace(base, vertices=v, normals=smooth_normals(v, base.faces))
        fields = {n[6:]: z[n] for n in z.files if n.startswith("field_")}
        st = RoundState(k, mesh, z["offset"], z["texture_lin"], fields, {})
    meta = json.loads((folder / "state.json").read_text())
    st.summary, st.kept, st.moved_vertices = meta["summary"], meta["kept"], meta["moved_vertices"]
    return st


def run_rounds(scene: Scene, cfg, out: Path, book: StageBook, key: str, size: int, start: RoundState
               ) -> list[RoundState]:
    """Every round run (or resumed); the last kept one is the touch-up's result."""
    tcfg: TouchupConfig = cfg.touchup_settings
    half = start.summary["figures"]["sweep_half_range"]
    rounds = [start]
    best = start
    fit_cfg = dataclasses.replace(cfg.fit, steps=tcfg.fit_steps, rebake_at=tcfg.rebake_at, gutter=cfg.texture.gutter)
    for k in range(1, tcfg.rounds + 1):
        folder = out / DIR / f"round{k}"
        rkey = key_of(key, k, tcfg)
        key = rkey

        def compute(prev=best, k=k, folder=folder, rkey=rkey) -> RoundState:
            mesh, offset, movable, n = solve_round(prev, scene, tcfg, cfg.diagnose, half)
            st = RoundState(k, mesh, offset, prev.texture_lin, prev.fields, prev.summary, kept=False, moved_vertices=n)
            if n == 0:
                save_round(folder, st)
                return st
            _refit(st, prev, scene, fit_cfg, cfg, folder, rkey, size)
            st.fields["movable"] = movable | prev.fields.get("movable", False)
            before = movable_error(prev.fields, movable)
            after = movable_error(st.fields, movable)
            gain = 10 * math.log10(before / after) if before > 0 and after > 0 else 0.0
            st.summary["evidence_gain_db"] = round(gain, 4)
            st.kept = gain >= tcfg.min_gain_db
            log.info("touch-up round %d: %d vertices moved (max %.3g), fitted-view evidence over the moved "
                     "surface %+.3f dB: %s", k, n, float(np.abs(offset).max()), gain, "kept" if st.kept else "dropped")
            save_round(folder, st)
            return st

        st = book.run(f"touchup{k}", rkey, [folder / "state.npz", folder / "state.json"], compute,
                      lambda folder=folder, k=k: load_round(folder, k, scene.mesh))
        rounds.append(st)
        if not st.kept:
            break
        best = _attach(st, scene, fit_cfg, cfg, folder, rkey, size, prev=best)
    return rounds


def _refit(st: RoundState, prev: RoundState, scene: Scene, fit_cfg, cfg, folder: Path, rkey: str, size: int) -> None:
    """Render, re-fit (warm), bake and diagnose the round's mesh into `st`."""
    moved_scene = dataclasses.replace(scene, mesh=st.mesh)
    gbuffers, _ = build_gbuffers(moved_scene, Path(cfg_out(folder)) / "cache" / "gbuffer", cfg.raster.backend,
                                 quiet=cfg.quiet)
    fit = fit_scene(moved_scene, gbuffers, prev.texture_lin, None, fit_cfg, folder, seed=cfg.seed, quiet=cfg.quiet,
                    config_hash=rkey, warm=prev.fit.model if prev.fit is not None else None)
    texels = rasterise_uv(st.mesh, size)
    st.texture_lin = bake_model(moved_scene, gbuffers, texels, render_texel_head(fit.model, size),
                                residual_renderer(fit.model, moved_scene, gbuffers),
                                dataclasses.replace(cfg.bake, gutter=cfg.texture.gutter)).texture_lin
    dg = diagnose(moved_scene, gbuffers, texels, st.texture_lin, cfg.diagnose, corrections=fit.corrections,
                  history=fit.history)
    st.fields = E.grid_fields(dg.work)
    st.summary = {**dg.summary_fields(), "figures": dg.figures}
    st.fit, st.gbuffers = fit, gbuffers


def _attach(st: RoundState, scene: Scene, fit_cfg, cfg, folder: Path, rkey: str, size: int, prev: RoundState
            ) -> RoundState:
    """A kept round's fit and G-buffers (loaded when the round was resumed from its files)."""
    if st.fit is None:
        moved_scene = dataclasses.replace(scene, mesh=st.mesh)
        st.gbuffers, _ = build_gbuffers(moved_scene, Path(cfg_out(folder)) / "cache" / "gbuffer",
                                        cfg.raster.backend, quiet=cfg.quiet)
        st.fit = fit_scene(moved_scene, st.gbuffers, prev.texture_lin, None, fit_cfg, folder, seed=cfg.seed,
                           quiet=cfg.quiet, config_hash=rkey, warm=prev.fit.model if prev.fit is not None else None)
    return st


def cfg_out(folder: Path) -> Path:
    """The run directory of a round folder (`<run>/touchup/round<k>`): G-buffers share its cache."""
    return folder.parent.parent


def stage_touchup(ctx: RunContext, key: str, fit: FitResult, baked_tex: np.ndarray, diag: dict,
                  grid_fields: dict[str, np.ndarray], frame: np.ndarray) -> dict:
    """Run the touch-up after the run's own diagnosis; write `touchup/` (frame: the run's (4, 4)
    scene -> glTF matrix) and score it on the held-out views. Returns {"heldout": scores like the
    other methods' (with per_view), "report": figures, "seconds": the touch-up's own time}."""
    scene, cfg, out, book, gbuffers = ctx.scene, ctx.cfg, ctx.out, ctx.book, ctx.gbuffers
    assert ctx.texels is not None
    size = ctx.texels.size
    start = RoundState(0, scene.mesh, np.zeros(len(scene.mesh.vertices)), baked_tex, grid_fields, diag, fit=fit,
                       gbuffers=gbuffers)
    rounds = run_rounds(scene, cfg, out, book, key, size, start)
    best = [r for r in rounds if r.kept][-1]
    final_scene = dataclasses.replace(scene, mesh=best.mesh)
    folder = out / DIR
    files = model_files(folder, list(cfg.export.formats)) + [folder / "offsets.ply"]
    half = diag["figures"]["sweep_half_range"]

    def export() -> list[Path]:
        written = write_model(folder, best.mesh, best.texture_lin, list(cfg.export.formats), unlit=cfg.export.unlit,
                              gltf_from_scene=frame, bits=cfg.texture.bits)
        scale = max(float(np.abs(best.offset).max()), diag["figures"]["geometry_tol"])
        return written + [write_offsets_ply(folder / "offsets.ply", best.mesh, best.offset, scale)]

    book.run("touchup_export", key_of(key, best.k, [r.kept for r in rounds], cfg.export, cfg.texture.bits,
                                      frame.tolist()),
             files, export, lambda: files)
    held = scene.manifest.heldout
    gb = best.gbuffers or gbuffers
    t0 = time.perf_counter()
    scores = score_method(final_scene, gb, {v.name: render_texture(gb[v.name], best.mesh, best.texture_lin)
                                            for v in held}, out / "heldout", "touchup")
    # the seconds its stages took when they ran (a resumed touch-up counts them as the others do)
    seconds = sum(v for k, v in book.timings.items() if k.startswith("touchup")) + time.perf_counter() - t0
    return {"heldout": scores, "report": report_figures(rounds, best, scene, half), "seconds": round(seconds, 3)}


def report_figures(rounds: list[RoundState], best: RoundState, scene: Scene, half: float) -> dict:
    """What moved, where and how far, round by round: summary.json `touchup`."""
    off = best.offset
    moving = np.abs(off) > 0
    area = _vertex_area(scene.mesh)
    out = {"rounds": [{"round": r.k, "kept": r.kept, "moved_vertices": r.moved_vertices,
                       "evidence_gain_db": r.summary.get("evidence_gain_db"),
                       "verdict": r.summary.get("verdict"),
                       "payoff_db": r.summary.get("payoff_db")} for r in rounds[1:]],
           "result_round": best.k,
           "moved_vertices": int(len(np.unique(welded(scene.mesh).inverse[moving]))),   # seam copies once
           "moved_share": round(float(area[moving].sum() / max(area.sum(), 1e-30)), 6),
           "offset_max": round(float(np.abs(off).max()), 6) if len(off) else 0.0,
           "offset_median_moved": round(float(np.median(np.abs(off[moving]))), 6) if moving.any() else 0.0,
           "offset_outward_max": round(float(off.max()), 6) if len(off) else 0.0,
           "offset_inward_max": round(float(-off.min()), 6) if len(off) else 0.0,
           "sweep_half_range": half,
           "centre": [round(float(c), 6) for c in (scene.mesh.vertices[moving] * area[moving, None]).sum(0)
                      / max(float(area[moving].sum()), 1e-30)] if moving.any() else None,
           "verdict_after": best.summary.get("verdict"),
           "payoff_db_after": best.summary.get("payoff_db")}
    return out


def _vertex_area(mesh: SceneMesh) -> np.ndarray:
    from featuretex.touchup.operators import vertex_areas

    return vertex_areas(mesh.vertices, mesh.faces)
