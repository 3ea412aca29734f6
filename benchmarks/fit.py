"""Time-to-quality of the learned fit on the demo scene.

    python benchmarks/fit.py [--run DIR] [--steps N] [--ablations]

Fits the demo twice from the same start: the default budget, scored on the held-out views at
every evaluation, and a 4x longer run whose final alignment-tolerant PSNR is the reference.
time_to_quality_s = fit wall seconds (set-up included, scoring excluded) until the default run's
held-out tolerant PSNR is within 0.5 dB of that reference. Also: trained object pixels per
second; achieved FLOP/s of the fit (dense arithmetic, see featuretex.fit.flops.train_flops) as a
fraction of a dense float32 matmul's FLOP/s measured in this run with the same threads; peak
RSS. Where the screen decoder runs its convolutions in bfloat16 (fit.precision auto on a CPU with
AMX), the fraction of a bfloat16 matmul's FLOP/s is printed too, and a short float32 run of the
same steps gives the float32 step time and fraction side by side. --ablations adds one
default-budget run per switched-off component.
Last printed line: a JSON object.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import resource
import shutil
import sys
import tempfile
import time
from dataclasses import asdict, fields, replace
from pathlib import Path

os.environ.setdefault("PYOPENGL_PLATFORM", "egl")
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402
import torch  # noqa: E402

from featuretex.bake.baseline import bake_baseline  # noqa: E402
from featuretex.demo import ensure_demo_scene  # noqa: E402
from featuretex.fit import FitConfig, render_view  # noqa: E402
from featuretex.fit.flops import train_flops  # noqa: E402
from featuretex.fit.loop import fit_scene  # noqa: E402
from featuretex.model.decoders import resolve_precision  # noqa: E402
from featuretex.raster.stage import build_gbuffers  # noqa: E402
from featuretex.raster.uvspace import rasterise_uv  # noqa: E402
from featuretex.scene.loaded import load_scene  # noqa: E402
from featuretex.scoring import metrics  # noqa: E402
from featuretex.scoring.render import render_texture  # noqa: E402
from featuretex.texels.size import auto_texture_size, median_pixel_footprint  # noqa: E402

log = logging.getLogger("featuretex")

ABLATIONS = {  # name -> FitConfig overrides that switch one component off
    "no_alignment": {"lr_align": 0.0},
    "no_colour_correction": {"lr_colour": 0.0},
    "head_only_decoder": {"decoder": "texel"},
    "no_ssim": {"w_ssim": 0.0, "w_l1": 1.0},
    "no_mip": {"mip": False},
}


def matmul_flops(threads: int, n: int = 2048, reps: int = 8, dtype: torch.dtype = torch.float32) -> float:
    """Dense matmul FLOP/s (2 n^3 per product) in `dtype`, best of `reps`, at `threads` threads."""
    torch.set_num_threads(threads)
    a, b = torch.randn(n, n, dtype=dtype), torch.randn(n, n, dtype=dtype)
    a @ b
    best = float("inf")
    for _ in range(reps):
        t = time.perf_counter()
        a @ b
        best = min(best, time.perf_counter() - t)
    return 2.0 * n ** 3 / best


SCALARS = {"int": int, "float": float, "str": str, "bool": bool}


def parse_overrides(items: list[str]) -> dict:
    """KEY=VALUE strings -> FitConfig fields, each converted to the field's type."""
    types = {f.name: f.type for f in fields(FitConfig)}
    out = {}
    for item in items:
        key, _, value = item.partition("=")
        if key not in types:
            raise SystemExit(f"--set: FitConfig has no field {key!r}")
        t = types[key] if isinstance(types[key], type) else SCALARS[types[key]]  # string annotations
        out[key] = value.lower() in ("1", "true", "yes") if t is bool else t(value)
    return out


def heldout_scores(scene, gbuffers, render) -> dict[str, float]:
    scores, weights = [], []
    for v in scene.manifest.heldout:
        m = np.asarray(gbuffers[v.name].coverage)
        pm = scene.photo_mask(v)
        m = m & pm if pm is not None else m
        if not m.any():
            continue
        scores.append(metrics.score_view(render(v), scene.photo(v), m))
        weights.append(int(m.sum()))
    return {k: round(float(x), 3) for k, x in metrics.aggregate(scores, weights).items()}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--run", type=Path, default=None, help="work folder (default: a temporary one)")
    ap.add_argument("--steps", type=int, default=FitConfig.steps, help="default budget (the long run does 4x)")
    ap.add_argument("--eval-every", type=int, default=25)
    ap.add_argument("--long-factor", type=int, default=4, help="reference run length / default (0 = skip)")
    ap.add_argument("--threads", type=int, default=0, help="torch threads (0 = all cores)")
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="FitConfig override for every run, e.g. --set lr_align=0.1 (repeatable)")
    ap.add_argument("--ablations", action="store_true")
    args = ap.parse_args()
    logging.basicConfig(level=logging.INFO, format="%(message)s")
    logging.getLogger("OpenGL").setLevel(logging.WARNING)

    work = args.run or Path(tempfile.mkdtemp(prefix="featuretex-fitbench-"))
    scene = load_scene(ensure_demo_scene())
    gbuffers, _ = build_gbuffers(scene, work / "cache", quiet=True)
    size = auto_texture_size(scene.mesh, median_pixel_footprint(scene, gbuffers))
    t = time.perf_counter()
    base = bake_baseline(scene, gbuffers, rasterise_uv(scene.mesh, size))
    baseline_s = time.perf_counter() - t
    baseline = heldout_scores(scene, gbuffers, lambda v: render_texture(gbuffers[v.name], scene.mesh, base.texture_lin))
    log.info("baseline (%d texels): %s", size, baseline)

    cfg = FitConfig(steps=args.steps, eval_every=args.eval_every, checkpoint_every=10 ** 9, threads=args.threads)
    cfg = replace(cfg, **parse_overrides(args.set))
    threads = cfg.threads or os.cpu_count() or 1
    mm = matmul_flops(threads)

    def fit(c: FitConfig, tag: str, trace: list | None):
        run = work / tag
        shutil.rmtree(run, ignore_errors=True)

        def hook(step, model, seconds):
            if trace is not None:
                s = heldout_scores(scene, gbuffers, lambda v: render_view(model, scene, gbuffers[v.name], v))
                trace.append({"step": step, "fit_s": round(seconds, 2), **s})
                log.info("  %s step %d at %.1f s: %s", tag, step, seconds, s)

        return fit_scene(scene, gbuffers, base.texture_lin, base.seen, c, run, seed=0, quiet=True,
                         config_hash="bench", eval_hook=hook)

    trace: list[dict] = []
    res = fit(cfg, "default", trace)
    neural = heldout_scores(scene, gbuffers, lambda v: render_view(res.model, scene, gbuffers[v.name], v))
    ref, ttq = None, None
    if args.long_factor > 0:
        n = args.long_factor * cfg.steps
        long = fit(replace(cfg, steps=n, eval_every=n), "long", None)
        ref = heldout_scores(scene, gbuffers, lambda v: render_view(long.model, scene, gbuffers[v.name], v))
        prepare = res.timings["prepare_s"]
        ttq = next((e["fit_s"] + prepare for e in trace if e["psnr_tolerant"] >= ref["psnr_tolerant"] - 0.5), None)

    st = res.stats
    flops = train_flops(res.model, st["pixels_rendered"], st["pixels_fitted"])
    achieved = flops / res.timings["train_s"]
    precision = resolve_precision(cfg.precision)
    mixed = {}
    if precision != "float32":   # the same steps with float32 convolutions, and the bfloat16 limit
        short = min(cfg.steps, 100)
        r32 = fit(replace(cfg, steps=short, eval_every=10 ** 9, precision="float32"), "float32", None)
        a32 = train_flops(r32.model, r32.stats["pixels_rendered"], r32.stats["pixels_fitted"]) / r32.timings["train_s"]
        mm16 = matmul_flops(threads, dtype=torch.bfloat16)
        mixed = {"flops_fraction_of_bfloat16_matmul": round(achieved / mm16, 3),
                 "matmul_bfloat16_gflops": round(mm16 / 1e9, 2),
                 "float32_step_s": round(r32.timings["train_s"] / max(1, r32.stats["steps"]), 3),
                 "float32_flops_fraction": round(a32 / mm, 3)}
    out = {
        "time_to_quality_s": round(ttq, 1) if ttq is not None else None,
        "pixels_per_s": round(st["pixels_fitted"] / res.timings["train_s"]),
        "flops_fraction": round(achieved / mm, 3),
        "peak_rss_gb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2 ** 20, 2),
        "achieved_gflops": round(achieved / 1e9, 2),
        "matmul_gflops": round(mm / 1e9, 2),
        "precision": precision,
        **mixed,
        "threads": threads,
        "steps": cfg.steps,
        "step_s": round(res.timings["train_s"] / max(1, st["steps"]), 3),
        "fit_timings_s": res.timings,
        "baseline_bake_s": round(baseline_s, 1),
        "texture_size": size,
        "heldout": {"baseline": baseline, "neural": neural, f"neural_{args.long_factor}x": ref},
        "gain_db": {"psnr": round(neural["psnr"] - baseline["psnr"], 3),
                    "psnr_tolerant": round(neural["psnr_tolerant"] - baseline["psnr_tolerant"], 3)},
        "trace": trace,
        "load_avg": os.getloadavg()[0],
    }
    if args.ablations:
        abl = {}
        for name, over in ABLATIONS.items():
            r = fit(replace(cfg, eval_every=cfg.steps, **over), f"ablate_{name}", None)
            abl[name] = heldout_scores(scene, gbuffers, lambda v: render_view(r.model, scene, gbuffers[v.name], v))
            log.info("ablation %s: %s", name, abl[name])
        out["ablations"] = abl
    out["config"] = asdict(cfg)
    if args.run is None:
        shutil.rmtree(work, ignore_errors=True)
    print(json.dumps(out))


if __name__ == "__main__":
    main()
