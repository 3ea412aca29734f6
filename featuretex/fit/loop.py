"""The optimisation loop: fit texture, decoder and per-view corrections to the fitted photos.

Held-out views are never fitted: they only enter `evaluate`, rendered with the reference exposure
and no alignment. The loop checkpoints every `checkpoint_every` steps and on Ctrl-C / SIGTERM
(the signal only raises a flag; the step in flight finishes first, so a checkpoint is always a
consistent state), and a re-run with the same run directory resumes from it.
"""

from __future__ import annotations

import json
import logging
import math
import signal
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import torch

import featuretex.model  # noqa: F401  (registers the built-in decoders)
from featuretex.atomic import atomic_path, write_json
from featuretex.errors import input_error
from featuretex.fit import checkpoint as ckpt
from featuretex.fit.config import FitConfig, check_fit_config
from featuretex.fit.losses import masked_ssim, psnr
from featuretex.fit.photoloss import photometric_loss
from featuretex.fit.rebake import rebake_colour_layer
from featuretex.fit.render import render_viewdata
from featuretex.fit.sampler import CropSampler, assemble, warped_targets
from featuretex.fit.viewdata import ViewData, mesh_tables, prepare_view
from featuretex.model.corrections import ViewCorrections, grid_shape
from featuretex.threads import job_threads
from featuretex.model.decoders import parameter_count, resolve_precision
from featuretex.model.scene_model import SceneModel
from featuretex.progress import Progress
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import rasterise_uv
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import Scene
from featuretex.stages import DAMAGED, discard

log = logging.getLogger("featuretex")
TRAIN_LOG_EVERY = 10  # steps between entries of history["train"]


@dataclass
class FitResult:
    model: SceneModel
    history: dict[str, Any]
    corrections: dict[str, np.ndarray]
    timings: dict[str, float]
    stopped: str = "steps"     # how the fit ended: "steps" | "plateau" (also when loaded from its files)
    loaded: bool = False       # read from the run folder's fit files, not fitted in this run
    stats: dict[str, float] = field(default_factory=dict)  # this session: steps, pixels fitted / rendered


@dataclass
class LoopState:
    step: int = 0
    elapsed_s: float = 0.0              # wall time of earlier sessions of this fit (resume)
    best_loss: float = math.inf
    bad_evals: int = 0
    window: list[float] = field(default_factory=list)   # losses since the last eval
    history: dict[str, Any] = field(default_factory=lambda: {
        "step": [], "loss": [], "heldout_psnr": [], "heldout_ssim": [], "elapsed_s": [],
        "train": {"step": [], "loss": []}})

    def to_dict(self) -> dict[str, Any]:
        return {"step": self.step, "elapsed_s": self.elapsed_s, "best_loss": self.best_loss,
                "bad_evals": self.bad_evals, "window": list(self.window), "history": self.history}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "LoopState":
        return cls(step=int(d["step"]), elapsed_s=float(d["elapsed_s"]), best_loss=float(d["best_loss"]),
                   bad_evals=int(d["bad_evals"]), window=[float(x) for x in d["window"]], history=d["history"])


# --- set-up ------------------------------------------------------------------------------------

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
    kernel does the texture update in one pass (measured 35 % faster than the default loop)."""
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


def forward_flops_per_pixel(model: SceneModel) -> dict[str, int]:
    """Dense arithmetic per pixel of one forward pass (texel gathers and activations not counted)."""
    out = model.decoder.flops_per_pixel()
    out["sampling"] = 2 * 8 * model.texture.out_channels   # upper bound: 8 trilinear taps per layer
    return out


def train_flops(model: SceneModel, pixels_rendered: float, pixels_covered: float) -> float:
    """Dense arithmetic of training steps that rendered `pixels_rendered` crop pixels, of which
    `pixels_covered` show the surface: forward (screen decoder on every crop pixel, SSIM's five
    11-tap separable blurs of 3 channels, head and texel filtering on surface pixels) times 3 for
    forward + backward (common practice: a backward pass costs about twice the forward)."""
    fl = forward_flops_per_pixel(model)
    ssim = 5 * 3 * 2 * 11 * 2
    per_rendered = fl.get("screen", 0) + ssim
    per_covered = fl["head"] + fl["sampling"]
    return 3.0 * (per_rendered * pixels_rendered + per_covered * pixels_covered)


def describe(model: SceneModel) -> str:
    fl = forward_flops_per_pixel(model)
    tex = model.texture
    screen = parameter_count(model.decoder.screen) if model.decoder.screen is not None else 0
    corr = parameter_count(model.corrections) if model.corrections is not None else 0
    return (f"fit model: colour layer {tex.size}x{tex.size}x3, latent layer {tex.latent_size}x{tex.latent_size}"
            f"x{tex.channels} ({tex.colour.numel() + tex.latent.numel():,} params), "
            f"decoder '{model.decoder_name}': head {parameter_count(model.decoder.head)} + screen {screen:,} "
            f"params, corrections {corr:,} params; per-pixel forward FLOPs: sampling <= {fl['sampling']}, "
            f"head {fl['head']}, screen {fl.get('screen', 0):,} ({model.precision} convolutions)")


# --- one step and evaluation ----------------------------------------------------------------------

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


# --- checkpoints and outputs ------------------------------------------------------------------

def _checkpoint_payload(key: str, model: SceneModel, opt: torch.optim.Optimizer, sampler: CropSampler,
                        state: LoopState) -> dict[str, Any]:
    return {"format": ckpt.FORMAT, "hash": key, "meta": model.meta(), "model": model.state_dict(),
            "optim": opt.state_dict(), "sampler": sampler.state_dict(), "torch_rng": torch.get_rng_state(),
            "loop": state.to_dict()}


def corrections_arrays(model: SceneModel, scene: Scene) -> dict[str, np.ndarray]:
    """Per scene view (fitted and held out): colour matrix, bias, alignment field, flags."""
    corr = model.corrections
    assert corr is not None
    fitted = corr.to_numpy()
    gh, gw = corr.align.shape[2:]
    names = [v.name for v in scene.views]
    V = len(names)
    M = np.tile(np.eye(3, dtype=np.float32), (V, 1, 1))
    b = np.zeros((V, 3), np.float32)
    a = np.zeros((V, gh, gw, 2), np.float32)
    is_fit = np.zeros(V, bool)
    for i, n in enumerate(names):
        j = model.view_index(n)
        if j is not None:
            M[i], b[i], a[i], is_fit[i] = fitted["colour_matrix"][j], fitted["colour_bias"][j], \
                fitted["alignment_px"][j], True
    sizes = np.array([[v.camera.width, v.camera.height] for v in scene.views], np.int64)
    return {"views": np.array(names), "fitted": is_fit, "reference": np.array(corr.names[corr.reference]),
            "colour_matrix": M, "colour_bias": b, "alignment_px": a, "image_size": sizes}


def _write_outputs(fit_dir: Path, key: str, model: SceneModel, scene: Scene, history: dict[str, Any],
                   timings: dict[str, float]) -> dict[str, np.ndarray]:
    corr = corrections_arrays(model, scene)
    with atomic_path(fit_dir / "corrections.npz") as tmp:
        np.savez_compressed(tmp, **corr)
    write_json(fit_dir / "history.json", {**history, "timings_s": timings})
    ckpt.save(fit_dir / "model.pt", {"format": ckpt.FORMAT, "hash": key, "meta": model.meta(),
                                     "model": model.state_dict(), "timings_s": timings})
    return corr


def load_fitted(fit_dir: Path, saved: dict[str, Any]) -> FitResult:
    """The finished fit from its files; raises (DAMAGED or RuntimeError) when one does not read back."""
    model = SceneModel.from_meta(saved["meta"])
    model.load_state_dict(saved["model"])
    model.eval()
    hist = json.loads((fit_dir / "history.json").read_text())
    timings = dict(saved.get("timings_s", hist.pop("timings_s", {})))
    hist.pop("timings_s", None)
    with np.load(fit_dir / "corrections.npz") as z:
        corr = {k: z[k] for k in z.files}
    return FitResult(model=model, history=hist, corrections=corr, timings=timings,
                     stopped=str(hist.get("stopped", "steps")), loaded=True)


class _StopRequest:
    """Ctrl-C / SIGTERM set a flag (a second Ctrl-C interrupts at once); handlers restored on exit."""

    def __init__(self) -> None:
        self.signum: int | None = None
        self._old: dict[int, Any] = {}

    def _handler(self, signum: int, frame: Any) -> None:
        if self.signum == signal.SIGINT and signum == signal.SIGINT:
            raise KeyboardInterrupt
        self.signum = signum
        log.warning("fit: stop requested; checkpointing after this step (Ctrl-C again to abort at once)")

    def __enter__(self) -> "_StopRequest":
        if threading.current_thread() is threading.main_thread():
            for s in (signal.SIGINT, signal.SIGTERM):
                self._old[s] = signal.signal(s, self._handler)
        return self

    def __exit__(self, *exc: Any) -> None:
        for s, h in self._old.items():
            signal.signal(s, h)


# --- the public entry point ---------------------------------------------------------------------

def fit_scene(scene: Scene, gbuffers: dict[str, GBuffer], init_texture_lin: np.ndarray,
              init_valid: np.ndarray | None, cfg: FitConfig, run_dir: Path, *, seed: int, quiet: bool,
              config_hash: str) -> FitResult:
    """Fit (or resume, or load) the model of `scene` into `run_dir/fit/`.

    init_texture_lin: (T, T, 3) float32 linear starting colour (the baseline bake, gutter filled);
    init_valid: (T, T) bool texels it measured (non-finite texels elsewhere are filled).
    Writes fit/model.pt, fit/history.json, fit/corrections.npz; while running, fit/checkpoint.pt.
    """
    return run_fit(scene, gbuffers, init_texture_lin, init_valid, cfg, Path(run_dir), seed=seed, quiet=quiet,
                   config_hash=config_hash)


def run_fit(scene: Scene, gbuffers: dict[str, GBuffer], init_texture_lin: np.ndarray,
            init_valid: np.ndarray | None, cfg: FitConfig, run_dir: Path, *, seed: int, quiet: bool,
            config_hash: str, eval_hook: Callable[[int, SceneModel, float], None] | None = None,
            step_hook: Callable[[int], None] | None = None, warm: SceneModel | None = None) -> FitResult:
    """fit_scene with hooks: eval_hook(step, model, fit seconds so far) after every evaluation (its own
    time is not counted), step_hook(step) after every step (tests use it to interrupt). warm: a fitted
    model of the same configuration and views to start from (its texture, decoder and corrections)
    instead of the initial texture (the geometry touch-up re-fits on a moved surface with the same UVs)."""
    check_fit_config(cfg)   # the pipeline checks first; this is for callers of run_fit itself
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
        ckpt.save(ck_path, _checkpoint_payload(key, model, opt, sampler,
                                               LoopState(**{**state.__dict__, "elapsed_s": fit_seconds()})))

    bar = Progress(cfg.steps, "fit", "step", quiet=quiet, initial=state.step)
    stopped = "steps"
    try:
        with _StopRequest() as stop:
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
                    n = rebake_colour_layer(scene, gbuffers, texels, model, cfg.edge_erode_px)
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
    corr = _write_outputs(fit_dir, key, model, scene, state.history, timings)
    if ck_path.exists():
        ck_path.unlink()
    model.eval()
    return FitResult(model=model, history=state.history, corrections=corr, timings=timings, stopped=stopped,
                     stats=stats)
