"""Displacement sweep: move every texel along its normal over a range of offsets and find where the
views agree best (a plane sweep along the normal, as multi-view stereo does).

For offset t each view samples its photo where it sees p + t n; the patch NCC score of the views
(featuretex/diagnose/consistency.py) is pooled over a small box, and the best offset is refined
to a sub-step by a parabola through its neighbours. Visibility is that of the scan surface (t = 0).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from featuretex.diagnose.consistency import Samples, box_mean, loo_ncc
from featuretex.diagnose.config import DiagnoseConfig
from featuretex.diagnose.observe import Observation


@dataclass
class SweepResult:
    offsets: np.ndarray       # (K,) float64 offsets tested, scene units (index K // 2 is 0)
    best: np.ndarray          # (D*D,) float32 refined best offset, scene units; NaN without evidence
    gain: np.ndarray          # (D*D,) float32 pooled NCC at the best offset minus at 0
    best_score: np.ndarray    # (D*D,) float32 pooled NCC at the best offset
    score0: np.ndarray        # (D*D,) float32 unpooled NCC at offset 0 (photo-consistency)
    confident: np.ndarray     # (D*D,) bool: best offset confidently better than 0
    evidence: np.ndarray = None  # (D*D,) float32 |best| x how clearly it beats 0 (0..1), scene units

    @property
    def displacement(self) -> np.ndarray:
        """(D*D,) float32 best offset where confident, else NaN."""
        return np.where(self.confident, self.best, np.nan).astype(np.float32)


def offsets(half_range: float, steps: int) -> np.ndarray:
    """(K,) symmetric offsets with 0 in the middle (K made odd)."""
    k = max(3, steps | 1)
    return np.linspace(-half_range, half_range, k)


def sweep(obs: list[Observation], pos: np.ndarray, nrm: np.ndarray, D: int, half_range: float,
          cfg: DiagnoseConfig) -> SweepResult:
    """Plane sweep along the normals. pos, nrm: (D*D, 3) float64 texel positions (scene units) and
    unit normals of the working grid."""
    ts = offsets(half_range, cfg.sweep_steps)
    K = len(ts)
    pooled = np.full((K, D * D), np.nan, np.float32)
    score0 = None
    cams = [(o, o.view.to_camera(pos[o.idx]), nrm[o.idx] @ o.view.R.T) for o in obs]
    for k, t in enumerate(ts):
        views = []
        for o, pc, nc in cams:
            q = pc + t * nc
            front = q[:, 2] > 1e-9
            xy = o.view.camera.project(np.where(front[:, None], q, pc)) + o.shift
            views.append(Samples(idx=o.idx[front], value=o.sample_grey(xy[front]), weight=o.cos[front]))
        s, w = loo_ncc(views, D, patch=cfg.patch, min_fill=cfg.min_patch_fill, min_contrast=cfg.min_contrast, trim=cfg.trim)
        if k == K // 2:
            score0 = s
        pooled[k] = pool(s, w, D, cfg.aggregate)
    res = decide(ts, pooled, score0, cfg)
    views_at = np.zeros(D * D)
    for o in obs:
        views_at[o.idx] += 1
    # with few views, some offset agrees by chance: too little to measure an offset with
    enough = views_at >= cfg.sweep_min_views
    res.confident &= enough
    # graded evidence for the geometry field: the offset weighted by its gain (full at twice the
    # confidence gain), so texels just under the threshold still rank above clean ones
    k = np.abs(res.best) > 0.5 * float(ts[1] - ts[0])
    clear = np.clip(np.nan_to_num(res.gain) / (2.0 * cfg.sweep_min_gain), 0.0, 1.0)
    res.evidence = np.where(enough & k & np.isfinite(res.best), np.abs(np.nan_to_num(res.best)) * clear,
                            0.0).astype(np.float32)
    res.confident = coherent(res.best, res.confident, D, float(ts[1] - ts[0]), cfg.aggregate)
    return res


def coherent(best: np.ndarray, confident: np.ndarray, D: int, step: float, size: int) -> np.ndarray:
    """(D*D,) bool: confident texels most of whose neighbours (size x size box) are confident too
    and agree with them within 1.5 offset steps. A real surface offset is smooth; offsets that
    only chance texture matches produce are scattered."""
    c = confident.reshape(D, D).astype(np.float32)
    b = np.where(confident, best, 0.0).reshape(D, D)
    share = box_mean(c, size)
    mean = box_mean(b * c, size) / np.maximum(share, 1e-6)
    ok = (share >= 0.5) & (np.abs(b - mean) <= 1.5 * step)
    return confident & ok.ravel()


def pool(score: np.ndarray, weight: np.ndarray, D: int, size: int) -> np.ndarray:
    """(D*D,) float32 weight-averaged score over a size x size box (cost aggregation)."""
    if size <= 1:
        return score
    sw = np.where(np.isfinite(score), score * weight, 0.0).reshape(D, D)
    w = np.where(np.isfinite(score), weight, 0.0).reshape(D, D)
    num, den = box_mean(sw, size), box_mean(w, size)
    out = np.where(den > 1e-12, num / np.maximum(den, 1e-30), np.nan).ravel()
    return np.where(np.isfinite(score), out, np.nan).astype(np.float32)


def decide(ts: np.ndarray, pooled: np.ndarray, score0: np.ndarray, cfg: DiagnoseConfig) -> SweepResult:
    """Best offset per texel with a parabolic sub-step, and whether it beats offset 0 confidently."""
    K, N = pooled.shape
    with np.errstate(invalid="ignore", divide="ignore"):
        return _decide(ts, pooled, score0, cfg, K, N)


def _decide(ts, pooled, score0, cfg, K, N) -> SweepResult:
    filled = np.where(np.isfinite(pooled), pooled, -np.inf)
    have = np.isfinite(pooled).any(axis=0) & np.isfinite(pooled[K // 2])
    k = np.argmax(filled, axis=0)
    cols = np.arange(N)
    best_s = filled[k, cols]
    # parabola through (k-1, k, k+1): vertex at k + (s- - s+) / (2 (s- - 2 s + s+))
    km, kp = np.clip(k - 1, 0, K - 1), np.clip(k + 1, 0, K - 1)
    sm, sp = filled[km, cols], filled[kp, cols]
    inner = (k > 0) & (k < K - 1) & np.isfinite(sm) & np.isfinite(sp)
    den = sm - 2 * best_s + sp
    frac = np.where(inner & (den < -1e-12), 0.5 * (sm - sp) / np.where(den < -1e-12, den, -1.0), 0.0)
    step = ts[1] - ts[0]
    best = ts[k] + np.clip(frac, -0.5, 0.5) * step
    gain = best_s - np.where(have, pooled[K // 2], np.nan)
    # a peak at the end of the range says only "further than this" (often a drift of the score
    # on texture that repeats): it is not a measured offset
    confident = (have & (k != K // 2) & (k > 0) & (k < K - 1)
                 & (gain >= cfg.sweep_min_gain) & (best_s >= cfg.sweep_min_score))
    return SweepResult(offsets=ts, best=np.where(have, best, np.nan).astype(np.float32),
                       gain=np.where(have, gain, np.nan).astype(np.float32),
                       best_score=np.where(have, best_s, np.nan).astype(np.float32),
                       score0=score0 if score0 is not None else np.full(N, np.nan, np.float32),
                       confident=confident)
