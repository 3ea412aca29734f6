"""Diagnosis quality and speed on the bundled demo (a dented jug with a smoothed band).

    python benchmarks/diagnose.py                 # fit the demo here, then diagnose it
    python benchmarks/diagnose.py --run DIR       # diagnose an earlier fit of the demo (DIR/fit/...)

Quality: per scan face, the mean of the `geometry` field over its texels against the demo's ground
truth (demo_assets/ground_truth/face_error.npy, signed offset to the true surface in meters):
  auroc     area under the ROC curve for "|true error| > 1.5 mm" (three times the scan's 0.5 mm RMS
            noise, so positives are the dent and the smoothed band), computed from the Mann-Whitney
            U statistic: AUROC = U / (n_pos n_neg) (scipy.stats.mannwhitneyu; Hanley & McNeil 1982)
  spearman  Spearman rank correlation (scipy.stats.spearmanr) of |displacement| with |true error|
            over the faces where the diagnosis measured a displacement
Speed: diagnose_s (diagnose + writing its outputs) next to fit_s (the learned fit of the same
scene, on the same machine). The last line printed is a JSON object.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import stats

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from featuretex.bake.baseline import bake_baseline          # noqa: E402
from featuretex.diagnose import DiagnoseConfig, diagnose, write_outputs  # noqa: E402
from featuretex.diagnose.alignment import load_corrections  # noqa: E402
from featuretex.raster.stage import build_gbuffers          # noqa: E402
from featuretex.raster.uvspace import TexelBuffer, rasterise_uv  # noqa: E402
from featuretex.scene.loaded import load_scene              # noqa: E402
from featuretex.texels.size import auto_texture_size, median_pixel_footprint    # noqa: E402

THRESHOLD_M = 0.0015
SCENE = REPO / "demo_assets" / "scene" / "scene.yaml"
TRUTH = REPO / "demo_assets" / "ground_truth" / "face_error.npy"


def per_face(field: np.ndarray, texels: TexelBuffer, faces: int) -> np.ndarray:
    """(F,) mean of a (T, T) field over each face's texels; NaN for faces with no finite texel."""
    v = texels.valid & np.isfinite(field)
    f = texels.tri[v]
    s = np.bincount(f, field[v], faces)
    n = np.bincount(f, None, faces)
    return np.where(n > 0, s / np.maximum(n, 1), np.nan)


def auroc(score: np.ndarray, positive: np.ndarray) -> float:
    """AUROC = U / (n_pos n_neg) with U the Mann-Whitney statistic of the positives (ties count 1/2)."""
    pos, neg = score[positive], score[~positive]
    if len(pos) == 0 or len(neg) == 0:
        return float("nan")
    u = stats.mannwhitneyu(pos, neg, alternative="two-sided").statistic
    return float(u / (len(pos) * len(neg)))


def fit_here(scene, gbuffers, texels, run: Path) -> tuple[dict, dict, np.ndarray, float]:
    from featuretex.fit import FitConfig, fit_scene, render_texel_head

    base = bake_baseline(scene, gbuffers, texels)
    t0 = time.perf_counter()
    res = fit_scene(scene, gbuffers, base.texture_lin, base.seen, FitConfig(), run, seed=0, quiet=True,
                    config_hash="benchmark")
    fit_s = time.perf_counter() - t0
    return res.corrections, res.history, render_texel_head(res.model, texels.size), fit_s


def from_run(run: Path, scene, gbuffers, texels: TexelBuffer) -> tuple[dict, dict, np.ndarray, float]:
    """An earlier fit of the demo in `run` (a featuretex run dir, or any dir holding fit/):
    corrections, history, its texture (texture.png; else the baseline bake) and its fit seconds
    (stages.json; else the fit's own total in history.json)."""
    from PIL import Image

    from featuretex.scene.colour import srgb_to_linear

    corr = load_corrections(run / "fit" / "corrections.npz")
    hist = json.loads((run / "fit" / "history.json").read_text())
    png = run / "texture.png"
    if png.is_file():
        tex = srgb_to_linear(np.asarray(Image.open(png).convert("RGB"), np.float32) / 255.0)
        if tex.shape[0] != texels.size:
            raise SystemExit(f"{png} is {tex.shape[0]} texels, the scene's auto size is {texels.size}")
    else:
        print(f"{run} has no texture.png: judging the baseline bake's texture")
        tex = bake_baseline(scene, gbuffers, texels).texture_lin
    stages = run / "stages.json"
    if stages.is_file():
        fit_s = float(json.loads(stages.read_text()).get("fit", {}).get("seconds", float("nan")))
    else:
        fit_s = float(hist.get("timings_s", {}).get("total_s", float("nan")))
    return corr, hist, tex, fit_s


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--run", type=Path, help="a featuretex run dir of the demo whose fit to diagnose")
    args = ap.parse_args()
    scene = load_scene(SCENE)
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        gbuffers, _ = build_gbuffers(scene, work / "cache" / "gbuffer", quiet=True)
        size = auto_texture_size(scene.mesh, median_pixel_footprint(scene, gbuffers))
        texels = rasterise_uv(scene.mesh, size)
        corr, hist, tex, fit_s = from_run(args.run, scene, gbuffers, texels) if args.run else fit_here(scene, gbuffers, texels, work)
        t0 = time.perf_counter()
        dg = diagnose(scene, gbuffers, texels, tex, DiagnoseConfig(), corrections=corr, history=hist)
        write_outputs(work / "out", dg, scene, texels)
        diagnose_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        plain = diagnose(scene, gbuffers, texels, tex, DiagnoseConfig())     # the same without the fit's fields
        plain_s = time.perf_counter() - t0
        keep = REPO / "runs" / "bench_diagnose"
        write_outputs(keep, dg, scene, texels)

    err = np.load(TRUTH)
    F = len(scene.mesh.faces)
    positive = np.abs(err) > THRESHOLD_M
    out = {}
    for name, d in (("", dg), ("without_alignment_", plain)):
        g = per_face(d.geometry, texels, F)
        ok = np.isfinite(g) & np.isfinite(err)
        out[f"{name}auroc"] = auroc(g[ok], positive[ok])
        disp = per_face(np.abs(d.displacement), texels, F)
        ok_d = np.isfinite(disp) & np.isfinite(err)
        out[f"{name}spearman"] = (float(stats.spearmanr(disp[ok_d], np.abs(err[ok_d])).statistic)
                                  if ok_d.sum() > 2 else float("nan"))
        out[f"{name}faces_with_displacement"] = int(ok_d.sum())
        out[f"{name}verdict"] = d.verdict
    for k in ("align_offset", "align_misplacement", "sweep_evidence", "consistency", "silhouette_offset"):
        if k in dg.extra:
            h = per_face(np.abs(dg.extra[k]), texels, F)
            ok = np.isfinite(h) & np.isfinite(err)
            out[f"auroc_{k}_alone"] = auroc(-h[ok] if k == "consistency" else h[ok], positive[ok])
    print(f"verdict: {dg.verdict}; areas: {dg.areas}")
    for r in dg.reasons:
        print("  -", r)
    print(f"error map: {keep / 'error_map.png'}")
    result = {"auroc": out["auroc"], "spearman": out["spearman"], "diagnose_s": round(diagnose_s, 2),
              "fit_s": round(fit_s, 2), "diagnose_without_alignment_s": round(plain_s, 2),
              "threshold_m": THRESHOLD_M, "texture_size": size, "working_grid": dg.figures["working_grid"],
              "positives": int(positive[np.isfinite(err)].sum()),
              **{k: v for k, v in out.items() if k not in ("auroc", "spearman")}}
    print(json.dumps({k: (round(v, 4) if isinstance(v, float) else v) for k, v in result.items()}))


if __name__ == "__main__":
    main()
