"""Texture under-fit: residual the views agree on but the texture does not reproduce, and whether
more fitting (loss still falling) or more texels (texture coarser than the photos) would remove it."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from featuretex.diagnose.consistency import box_mean


@dataclass
class FitProgress:
    """How the fit's training loss ended."""

    known: bool                # a usable loss history was given
    tail_drop: float           # relative loss drop over the last `tail` of the steps (0.03 = 3 %)
    steps: int                 # last step recorded


def fit_progress(history: dict | list | None, tail: float) -> FitProgress:
    """Read `fit/history.json` in either layout: {"step": [...], "loss": [...]} or a list of
    {"step": s, "loss": l} records (other keys ignored; also under a "train" key)."""
    steps, loss = _series(history)
    if len(loss) < 4:
        return FitProgress(known=False, tail_drop=0.0, steps=int(steps[-1]) if len(steps) else 0)
    order = np.argsort(steps, kind="stable")
    steps, loss = steps[order], loss[order]
    cut = steps[-1] - tail * (steps[-1] - steps[0])
    before, late = loss[steps <= cut], loss[steps > cut]
    if len(before) == 0 or len(late) == 0:
        return FitProgress(known=False, tail_drop=0.0, steps=int(steps[-1]))
    # medians of short windows either side of the cut and at the end: robust to per-step noise
    w = max(1, len(late) // 3)
    start, end = float(np.median(before[-w:])), float(np.median(late[-w:]))
    drop = (start - end) / end if end > 0 else 0.0
    return FitProgress(known=True, tail_drop=drop, steps=int(steps[-1]))


def _series(history) -> tuple[np.ndarray, np.ndarray]:
    if not history:
        return np.zeros(0), np.zeros(0)
    if isinstance(history, dict) and "train" in history and not isinstance(history.get("loss"), list):
        history = history["train"]
    if isinstance(history, dict):
        loss = history.get("loss") or []
        steps = history.get("step") or list(range(len(loss)))
        pairs = list(zip(steps, loss))
    else:
        pairs = [(r.get("step", i), r.get("loss")) for i, r in enumerate(history) if isinstance(r, dict)]
    pairs = [(float(s), float(l)) for s, l in pairs
             if isinstance(l, (int, float)) and isinstance(s, (int, float)) and math.isfinite(l)]
    if not pairs:
        return np.zeros(0), np.zeros(0)
    a = np.array(pairs)
    return a[:, 0], a[:, 1]


@dataclass
class Residual:
    """Per working texel (D, D)."""

    residual: np.ndarray    # float32 RMS over a patch of consensus - texture, sRGB units
    spread: np.ndarray      # float32 RMS over a patch of the views' spread about their consensus, sRGB
    agreement: np.ndarray   # float32 residual^2 / (residual^2 + spread^2): share the views agree on


def consistent_residual(consensus_srgb: np.ndarray, texture_srgb: np.ndarray, variance: np.ndarray,
                        seen: np.ndarray, patch: int) -> Residual:
    """consensus_srgb, texture_srgb: (D, D, 3) sRGB; variance: (D, D) views' variance about the
    consensus (sRGB^2, channel mean); seen: (D, D) bool, texels with a consensus."""
    d2 = np.where(seen, ((consensus_srgb - texture_srgb) ** 2).mean(-1), 0.0)
    v = np.where(seen, variance, 0.0)
    n = box_mean(seen, patch)
    inv = 1.0 / np.maximum(n, 1e-12)
    r = np.sqrt(np.maximum(box_mean(d2, patch) * inv, 0.0))
    s = np.sqrt(np.maximum(box_mean(v, patch) * inv, 0.0))
    agree = r * r / np.maximum(r * r + s * s, 1e-12)
    nan = ~seen
    return Residual(*(np.where(nan, np.nan, a).astype(np.float32) for a in (r, s, agree)))


def underfit_weight(progress: FitProgress, ratio: float, cfg) -> tuple[float, list[str]]:
    """Weight in [settled_texture_weight, 1] of under-fit evidence, and why: 1 when the loss was
    still falling or the texture is coarser than the photos; no history counts as 'maybe'."""
    why = []
    if progress.known and progress.tail_drop >= cfg.still_falling:
        why.append("falling")
    if math.isfinite(ratio) and ratio >= cfg.footprint_ratio_tol:
        why.append("coarse")
    if why or not progress.known:
        return 1.0, why
    return cfg.settled_texture_weight, why
