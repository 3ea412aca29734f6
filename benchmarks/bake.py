"""Bake quality on the demo: what of the learned fit one ordinary RGB texture keeps.

    python benchmarks/bake.py [--scene PATH/scene.yaml] [--run DIR] [--steps N]

Fits the demo (or loads the fit already in --run DIR), bakes the model, and scores baseline,
neural and baked renders at the held-out views side by side in this one run. Targets:
baked alignment-tolerant PSNR >= baseline + 1.5 dB, plain PSNR >= baseline - 0.2 dB,
bake gap (neural - baked, tolerant) <= 1 dB, seam ratio at held-out views <= 1.5.
The last printed line is a JSON object.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("PYOPENGL_PLATFORM", "egl")

from featuretex.bake.baseline import bake_baseline  # noqa: E402
from featuretex.bake.neural import BakeConfig, bake_model  # noqa: E402
from featuretex.demo import ensure_demo_scene  # noqa: E402
from featuretex.fit.config import FitConfig  # noqa: E402
from featuretex.fit.loop import fit_scene  # noqa: E402
from featuretex.fit.render import render_texel_head, render_view, residual_renderer  # noqa: E402
from featuretex.raster.stage import build_gbuffers  # noqa: E402
from featuretex.raster.uvspace import rasterise_uv  # noqa: E402
from featuretex.scene.loaded import load_scene  # noqa: E402
from featuretex.scoring.heldout import score_bake, score_method  # noqa: E402
from featuretex.scoring.render import render_texture  # noqa: E402
from featuretex.scoring.seams import seam_ratio  # noqa: E402
from featuretex.stages import key_of  # noqa: E402
from featuretex.texels.size import auto_texture_size, median_pixel_footprint  # noqa: E402
from featuretex.texels.visibility import usable_mask  # noqa: E402


def _brief(s: dict) -> dict:
    return {k: (round(v, 3) if isinstance(v, float) else v) for k, v in s.items() if k != "per_view"}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--scene", type=Path, default=None, help="scene.yaml (default: the bundled demo)")
    ap.add_argument("--run", type=Path, default=None, help="run folder (a finished fit there is reused)")
    ap.add_argument("--steps", type=int, default=None, help="fit steps (default: FitConfig's)")
    args = ap.parse_args(argv)
    scene = load_scene(args.scene or ensure_demo_scene())
    run = args.run or Path(tempfile.mkdtemp(prefix="featuretex-bench-bake-"))
    gbuffers, _ = build_gbuffers(scene, run / "cache" / "gbuffer", quiet=True)
    size = auto_texture_size(scene.mesh, median_pixel_footprint(scene, gbuffers))
    texels = rasterise_uv(scene.mesh, size)
    base = bake_baseline(scene, gbuffers, texels)

    fcfg = FitConfig() if args.steps is None else FitConfig(steps=args.steps)
    t0 = time.perf_counter()
    fit = fit_scene(scene, gbuffers, base.texture_lin, base.seen, fcfg, run, seed=0, quiet=True,
                    config_hash=key_of(scene.content_hash, size))
    fit_s = time.perf_counter() - t0
    model = fit.model.eval()

    held = list(scene.manifest.heldout)
    masks = {v.name: usable_mask(scene, v, gbuffers[v.name]) for v in held}
    base_r = {v.name: render_texture(gbuffers[v.name], scene.mesh, base.texture_lin) for v in held}
    neural_r = {v.name: render_view(model, scene, gbuffers[v.name], v) for v in held}
    s_base = score_method(scene, gbuffers, base_r, method="baseline")
    s_neural = score_method(scene, gbuffers, neural_r, method="neural")

    t0 = time.perf_counter()
    head, residual_of = render_texel_head(model, texels.size), residual_renderer(model, scene, gbuffers)
    baked = bake_model(scene, gbuffers, texels, head, residual_of, BakeConfig())
    bake_s = time.perf_counter() - t0
    head_only = bake_model(scene, gbuffers, texels, head, residual_of, BakeConfig(residual=False))
    out = score_bake(scene, gbuffers, baked.texture_lin, s_neural)
    s_baked, seams = out["baked"], out["seams"]
    s_head = score_bake(scene, gbuffers, head_only.texture_lin, s_neural)["baked"]
    seams_base = seam_ratio(scene.mesh, gbuffers, base_r, held, masks)

    res = {
        "texture_size": size, "fit_steps": fcfg.steps, "fit_s": round(fit_s, 1), "bake_s": round(bake_s, 2),
        "seen_fraction": round(float(baked.seen.sum() / max(1, texels.valid.sum())), 4),
        "baseline": _brief(s_base), "neural": _brief(s_neural), "baked": _brief(s_baked),
        "baked_head_only": _brief(s_head),
        "tolerant_gain_db": round(s_baked["psnr_tolerant"] - s_base["psnr_tolerant"], 3),
        "plain_delta_db": round(s_baked["psnr"] - s_base["psnr"], 3),
        "bake_gap_db": round(out["bake_gap_db"], 3),
        "seam_ratio": round(seams["ratio"], 3) if seams["ratio"] is not None else None,
        "seam_ratio_baseline": round(seams_base["ratio"], 3) if seams_base["ratio"] is not None else None,
        "seam_ratio_photo": round(seams["photo_ratio"], 3) if seams.get("photo_ratio") is not None else None,
        "seam_pairs": seams["seam_pairs"],
    }
    res["targets_met"] = {
        "tolerant_gain_ge_1.5db": res["tolerant_gain_db"] >= 1.5,
        "plain_ge_baseline_minus_0.2db": res["plain_delta_db"] >= -0.2,
        "bake_gap_le_1db": res["bake_gap_db"] <= 1.0,
        "seam_ratio_le_1.5": res["seam_ratio"] is not None and res["seam_ratio"] <= 1.5,
    }
    for k in ("baseline", "neural", "baked", "baked_head_only"):
        print(f"{k:16s} {res[k]}", file=sys.stderr)
    print(json.dumps(res))
    return 0


if __name__ == "__main__":
    sys.exit(main())
