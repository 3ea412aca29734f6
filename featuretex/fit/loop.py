"""The optimisation loop: fit texture, decoder and per-view corrections to the fitted photos.

Held-out views are never fitted: they only enter `evaluate`, rendered with the reference exposure
and no alignment. The loop checkpoints every `checkpoint_every` steps and on Ctrl-C / SIGTERM
(`stop.py`), and a re-run with the same run directory resumes from it; the state and files it
writes are in `outputs.py`, its arithmetic count in `flops.py`.
"""

from __future__ import annotations

import logging
import math
import signal
import time
from pathlib import Path
from typing import Callable

import numpy as np
import torch

from featuretex.errors import input_error
from featuretex.fit import checkpoint as ckpt
from featuretex.fit.config import FitConfig, check_fit_config
from featuretex.fit.flops import describe
from featuretex.fit.losses import masked_ssim, psnr
from featuretex.fit.outputs import FitResult, LoopState, checkpoint_payload, load_fitted, write_outputs
from featuretex.fit.photoloss import photometric_loss
from featuretex.fit.rebake import rebake_colour_layer
from featuretex.fit.render import render_viewdata
from featuretex.fit.sampler import CropSampler, assemble, warped_targets
from featuretex.fit.stop import StopRequest
from featuretex.fit.viewdata import ViewData, mesh_tables, prepare_view
from featuretex.model.corrections import ViewCorrections, grid_shape
from featuretex.model.decoders import resolve_precision
from featuretex.model.scene_model import SceneModel
from featuretex.progress import Progress
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import rasterise_uv
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import Scene
from featuretex.stages import DAMAGED, discard
from featuretex.threads import job_threads

log = logging.getLogger("featuretex")
TRAIN_LOG_EVERY = 10  # steps between entries of history["train"]


def build_model(cfg: FitConfig, init_texture_lin: np.ndarray, names: list[str], sizes: list[tuple[int, int]],
                reference: int, rng: np.random.Generator) -> SceneModel:
    size = cfg.texture_size or int(init_texture_lin.shape[0])
    H = max(s[1] for s in sizes)
    W = max(s[0] for s in sizes)
    corr = ViewCorrections(names, sizes, grid_shape(H, W, cfg.align_cell_px), reference)
    kwargs = {"hidden": cfg.hidden, "layers": cfg.layers, "bound": cfg.residual_bound}
    model = SceneModel(size, cfg.channels, cfg.decoder, kwargs, corr, cfg.latent_scale, cfg.mip,
                       resolve_precision(cfg.precision))
    model.texture.initialise(init_texture_lin, rng)
    return model


def fill_unmeasured(tex: np.ndarray, valid: np.ndarray | None) -> np.ndarray:
    """Texels that are not finite get the value of the nearest finite texel (init must be defined)."""
    tex = np.asarray(tex, np.float32)
    bad = ~np.isfinite(tex).all(-1)
    if not bad.any():
        return tex
    from scipy import ndimage

    _, (ri, ci) = ndimage.distance_transform_edt(bad, return_indices=True)
    return tex[ri, ci]


def make_optimiser(model: SceneModel, cfg: FitConfig) -> torch.optim.Optimizer:
    """Adam, one parameter group per part, each with its own base learning rate. The fused CPU
    kernel does the texture update in one pass instead of the default per-parameter loop."""
    assert model.corrections is not None
    groups = [{"params": [model.texture.colour], "base_lr": cfg.lr},
              {"params": [model.texture.latent], "base_lr": cfg.lr_latent},
              {"params": list(model.decoder.parameters()), "base_lr": cfg.lr_decoder},
              {"params": [model.corrections.colour_delta, model.corrections.colour_bias], "base_lr": cfg.lr_colour},
              {"params": [model.corrections.align], "base_lr": cfg.lr_align}]
    for g in groups:
        g["lr"] = g["base_lr"]
    return torch.optim.Adam(groups, betas=(0.9, 0.99), fused=True)


def lr_factor(step: int, cfg: FitConfig) -> float:
    """Linear warm-up, then cosine decay to final_lr_frac at the last step."""
    if step < cfg.warmup:
        return (step + 1) / cfg.warmup
    span = max(1, cfg.steps - cfg.warmup)
    t = min(1.0, (step - cfg.warmup) / span)
    return cfg.final_lr_frac + (1 - cfg.final_lr_frac) * 0.5 * (1 + math.cos(math.pi * t))


def cache_geometry(views: list[ViewData], budget_gb: float) -> int:
    """Precompute crop geometry for as many views as `budget_gb` holds, in the given order (fitted
    views are drawn equally often, so any of them will do); returns how many."""
    left = budget_gb * 1e9
    n = 0
    for vd in views:
        need = vd.geometry_nbytes()
        if need > left:
            break
        vd.cache_geometry()
        left -= need
        n += 1
    return n


def train_step(model: SceneModel, opt: torch.optim.Optimizer, views: list[ViewData], sampler: CropSampler,
               cfg: FitConfig, step: int) -> tuple[float, int]:
    """One Adam step on a batch of crops. Returns (loss, object pixels in the loss)."""
    f = lr_factor(step, cfg)
    for g in opt.param_groups:
        g["lr"] = g["base_lr"] * f
    corr = model.corrections
    assert corr is not None
    batch = assemble(views, sampler.next(), sampler.size, model.decoder.halo)
    render = model(batch.pixels)
    pred = corr.apply_colour(render.total, batch.view_idx)
    target = warped_targets(batch, corr, align=True)
    l1, ssim = photometric_loss(pred, target, batch.loss_mask)   # on sRGB-encoded values
    loss = cfg.w_l1 * l1 + cfg.w_ssim * (1.0 - ssim)
    reg = corr.regulariser()
    loss = loss + cfg.w_colour * reg["colour"] + cfg.w_align_mag * reg["align_mag"] \
        + cfg.w_align_smooth * reg["align_smooth"]
    opt.zero_grad(set_to_none=True)
    loss.backward()
    opt.step()
    return float(loss.item()), int(batch.loss_mask.sum().item())


@torch.no_grad()
def evaluate(model: SceneModel, views: list[ViewData]) -> tuple[float | None, float | None]:
    """Pixel-weighted mean held-out PSNR (dB) and SSIM inside the score masks, on sRGB values."""
    if not views:
        return None, None
    ps, ss, ws = [], [], []
    for vd in views:
        colour, residual = render_viewdata(model, vd)
        img = colour if residual is None else colour + residual
        m = vd.score_mask
        n = int(m.sum())
        if n == 0:
            continue
        H, W = vd.shape
        photo = vd.photo_window(0, H, 0, W).permute(1, 2, 0).numpy()
        a, b = linear_to_srgb(img), linear_to_srgb(photo)
        ps.append(psnr(float(((a - b)[m] ** 2).mean())))
        ta = torch.from_numpy(a).permute(2, 0, 1)[None]
        tb = torch.from_numpy(b).permute(2, 0, 1)[None]
        ss.append(float(masked_ssim(ta, tb, torch.from_numpy(m)[None])))
        ws.append(n)
    if not ws:
        return None, None
    w = np.asarray(ws, np.float64) / sum(ws)
    return float(np.dot(w, ps)), float(np.dot(w, ss))


def fit_scene(scene: Scene, gbuffers: dict[str, GBuffer], init_texture_lin: np.ndarray,
              init_valid: np.ndarray | None, cfg: FitConfig, run_dir: Path, *, seed: int, quiet: bool,
              config_hash: str, eval_hook: Callable[[int, SceneModel, float], None] | None = None,
              step_hook: Callable[[int], None] | None = None, warm: SceneModel | None = None) -> FitResult:
    """Fit (or resume, or load) the model of `scene` into `run_dir/fit/`.

    init_texture_lin: (T, T, 3) float32 linear starting colour (the baseline bake, gutter filled);
    init_valid: (T, T) bool texels it measured (non-finite texels elsewhere are filled).
    Writes fit/model.pt, fit/history.json, fit/corrections.npz; while running, fit/checkpoint.pt.
    eval_hook(step, model, fit seconds so far) runs after every evaluation (its own time is not
    counted), step_hook(step) after every step (tests use it to interrupt). warm: a fitted model of
    the same configuration and views to start from (its texture, decoder and corrections) instead of
    the initial texture (the geometry touch-up re-fits on a moved surface with the same UVs).
    """
    check_fit_config(cfg)   # the pipeline checks first; this is for callers of fit_scene itself
    run_dir = Path(run_dir)
    key = ckpt.fit_hash(config_hash, cfg, seed)
    fit_dir = run_dir / "fit"
    model_path, ck_path = fit_dir / "model.pt", fit_dir / "checkpoint.pt"
    # the same thread count whether fitting or loading: later stages render with it, and torch's
    # float sums depend on how work is split between threads
    torch.set_num_threads(cfg.threads or job_threads())
    if model_path.is_file():
        saved = ckpt.load(model_path)
        if saved is not None and saved["hash"] == key:
            try:
                return load_fitted(fit_dir, saved)
            except (*DAMAGED, RuntimeError) as e:   # RuntimeError: tensors that do not fit the model
                discard("the finished fit", fit_dir, e)
    t_start = time.perf_counter()

    fitted, held = list(scene.manifest.fitted), list(scene.manifest.heldout)
    if not fitted:
        raise input_error(scene.file, "every view is marked holdout; nothing is left to fit", field="holdout")
    names = [v.name for v in fitted]
    reference = names.index(cfg.reference_view) if cfg.reference_view in names else 0
    if cfg.reference_view and cfg.reference_view not in names:
        raise input_error(scene.file, f"fit.reference_view '{cfg.reference_view}' is not a fitted view",
                          field="fit.reference_view")
    tables = mesh_tables(scene.mesh)
    train_views = [prepare_view(scene, gbuffers[v.name], v, i, erode_px=cfg.edge_erode_px, tables=tables)
                   for i, v in enumerate(fitted)]
    eval_views = [prepare_view(scene, gbuffers[v.name], v, -1, erode_px=0, tables=tables) for v in held]
    everyone = train_views + eval_views   # held-out views are rendered at every evaluation
    cached = cache_geometry(everyone, cfg.geometry_cache_gb)
    log.info("fit: crop geometry precomputed for %d of %d views", cached, len(everyone))
    sizes = [(v.camera.width, v.camera.height) for v in fitted]

    def start() -> tuple[SceneModel, torch.optim.Optimizer, CropSampler]:
        """Model, optimiser and crop sampler at step 0 (seeded: the same every time)."""
        torch.manual_seed(seed)
        model = build_model(cfg, fill_unmeasured(init_texture_lin, init_valid), names, sizes, reference,
                            np.random.default_rng(seed))
        if warm is not None:   # a re-fit starts from the model it refines
            model.load_state_dict(warm.state_dict())
        try:
            sampler = CropSampler(train_views, cfg.crop, cfg.batch, seed)
        except ValueError:
            raise input_error(scene.file, "no fitted view shows the mesh inside its photo mask",
                              field="views") from None
        return model, make_optimiser(model, cfg), sampler

    model, opt, sampler = start()
    log.info(describe(model))
    state = LoopState()
    ck = ckpt.load_checkpoint(ck_path, key) if ck_path.is_file() else None
    if ck is not None:
        try:
            model.load_state_dict(ck["model"])
            opt.load_state_dict(ck["optim"])
            sampler.load_state_dict(ck["sampler"])
            torch.set_rng_state(ck["torch_rng"])
            state = LoopState.from_dict(ck["loop"])
            log.info("fit: resuming from %s at step %d", ck_path, state.step)
        except (*DAMAGED, RuntimeError) as e:   # well-formed file, contents that do not fit this fit
            discard("the checkpoint", ck_path, e)
            model, opt, sampler = start()
            state = LoopState()
    t_prepare = time.perf_counter() - t_start

    timings = {"prepare_s": t_prepare, "train_s": 0.0, "eval_s": 0.0}
    session_t0 = time.perf_counter()
    hook_s = 0.0
    stats = {"steps": 0, "pixels_fitted": 0, "pixels_rendered": 0}

    def fit_seconds() -> float:
        return state.elapsed_s + (time.perf_counter() - session_t0) - hook_s

    def do_eval() -> None:
        nonlocal hook_s
        t = time.perf_counter()
        p, s = evaluate(model, eval_views)
        timings["eval_s"] += time.perf_counter() - t
        loss = float(np.mean(state.window)) if state.window else None
        h = state.history
        for k, v in (("step", state.step), ("loss", loss), ("heldout_psnr", p), ("heldout_ssim", s),
                     ("elapsed_s", round(fit_seconds(), 3))):
            h[k].append(v)
        if loss is not None:
            if loss < state.best_loss * (1 - cfg.plateau_tol):
                state.best_loss, state.bad_evals = loss, 0
            else:
                state.bad_evals += 1
        state.window = []
        shown = ([f"loss {loss:.4f}"] if loss is not None else []) + ([f"held-out {p:.2f} dB"] if p is not None else [])
        bar.set_postfix(", ".join(shown))   # nothing rather than 'nan' before the first step
        if eval_hook is not None:
            t = time.perf_counter()
            eval_hook(state.step, model, fit_seconds())
            hook_s += time.perf_counter() - t

    def save_checkpoint() -> None:
        ckpt.save(ck_path, checkpoint_payload(key, model, opt, sampler,
                                               LoopState(**{**state.__dict__, "elapsed_s": fit_seconds()})))

    bar = Progress(cfg.steps, "fit", "step", quiet=quiet, initial=state.step)
    stopped = "steps"
    try:
        with StopRequest() as stop:
            if state.step == 0 and not state.history["step"]:
                do_eval()
            while state.step < cfg.steps:
                t = time.perf_counter()
                loss, n_px = train_step(model, opt, train_views, sampler, cfg, state.step)
                timings["train_s"] += time.perf_counter() - t
                stats["steps"] += 1
                stats["pixels_fitted"] += n_px
                stats["pixels_rendered"] += cfg.batch * sampler.size ** 2
                if not math.isfinite(loss):
                    raise RuntimeError(f"fit diverged at step {state.step} (loss {loss}); lower fit.lr")
                state.step += 1
                state.window.append(loss)
                if cfg.rebake_at and state.step == cfg.rebake_at:
                    t = time.perf_counter()
                    texels = rasterise_uv(scene.mesh, model.texture.size)
                    n = rebake_colour_layer(scene, gbuffers, texels, model, cfg.edge_erode_px, cfg.gutter)
                    opt.state.pop(model.texture.colour, None)   # its moments belong to the old texture
                    timings["rebake_s"] = time.perf_counter() - t
                    log.info("fit: colour layer re-averaged from the registered photos at step %d (%d texels, "
                             "%.1f s)", state.step, n, timings["rebake_s"])
                if state.step % TRAIN_LOG_EVERY == 0:
                    state.history["train"]["step"].append(state.step)
                    state.history["train"]["loss"].append(round(float(np.mean(state.window[-TRAIN_LOG_EVERY:])), 6))
                bar.update()
                if step_hook is not None:
                    step_hook(state.step)
                if state.step % cfg.eval_every == 0 or state.step == cfg.steps:
                    do_eval()
                    if cfg.plateau and state.bad_evals >= cfg.plateau:
                        stopped = "plateau"
                        log.info("fit: training loss plateaued at step %d", state.step)
                        break
                if stop.signum is not None:
                    save_checkpoint()
                    log.warning("fit: checkpoint saved at step %d (%s); re-run to resume", state.step, ck_path)
                    if stop.signum == signal.SIGTERM:
                        raise SystemExit(128 + signal.SIGTERM)
                    raise KeyboardInterrupt
                if state.step % cfg.checkpoint_every == 0 and state.step < cfg.steps:
                    save_checkpoint()
            if state.history["step"] and state.history["step"][-1] != state.step:
                do_eval()
    finally:
        bar.close()
    timings["total_s"] = fit_seconds() + t_prepare
    timings["fit_s"] = timings["total_s"]             # the figure summary.json reports as timings_s.fit
    timings = {k: round(v, 3) for k, v in timings.items()}
    state.history["steps_done"] = state.step
    state.history["stopped"] = stopped
    corr = write_outputs(fit_dir, key, model, scene, state.history, timings)
    if ck_path.exists():
        ck_path.unlink()
    model.eval()
    return FitResult(model=model, history=state.history, corrections=corr, timings=timings, stopped=stopped,
                     stats=stats)
