"""Fit curves from fit/history.json, drawn with matplotlib (Agg, no display needed).

history.json (written by the fit loop): {"step": [...], "loss": [...], "heldout_psnr": [...],
"heldout_ssim": [...], "elapsed_s": [...], "train": {"step": [...], "loss": [...]}}; the top-level
lists are evaluations, "train" is the running training loss. Absent or empty lists draw nothing.
"""

from __future__ import annotations

import io
import math
from typing import Any

import matplotlib

matplotlib.use("Agg")
from matplotlib.figure import Figure  # noqa: E402  (after choosing the backend)

INK, MUTED, ACCENT, BASE = "#1f2a33", "#8a949c", "#0f7a6c", "#b5651d"


def _series(d: dict[str, Any], x: str, y: str) -> tuple[list[float], list[float]]:
    """Paired finite (x, y) values of two lists in `d` (None / NaN entries dropped)."""
    xs, ys = d.get(x) or [], d.get(y) or []
    pairs = [(float(a), float(b)) for a, b in zip(xs, ys)
             if a is not None and b is not None and math.isfinite(float(b))]
    return [p[0] for p in pairs], [p[1] for p in pairs]


def _figure() -> tuple[Figure, Any]:
    fig = Figure(figsize=(5.2, 3.0), dpi=110, layout="constrained")
    ax = fig.add_subplot()
    ax.grid(True, color="#e3e6e8", linewidth=0.8)
    ax.tick_params(colors=INK, labelsize=8)
    for s in ("top", "right"):
        ax.spines[s].set_visible(False)
    ax.set_xlabel("step", fontsize=9, color=INK)
    return fig, ax


def loss_figure(history: dict[str, Any]) -> Figure | None:
    """Training loss (thin) and evaluated loss (points) against step, log scale. None if no data."""
    tx, ty = _series(history.get("train") or {}, "step", "loss")
    ex, ey = _series(history, "step", "loss")
    if not tx and not ex:
        return None
    fig, ax = _figure()
    if tx:
        ax.plot(tx, ty, color=MUTED, linewidth=1.0, label="training loss")
    if ex:
        ax.plot(ex, ey, color=INK, linewidth=1.6, marker="o", markersize=3, label="loss at evaluation")
    if min(ty + ey) > 0:
        ax.set_yscale("log")
    ax.set_ylabel("loss", fontsize=9, color=INK)
    ax.legend(fontsize=8, frameon=False)
    return fig


def psnr_figure(history: dict[str, Any], baseline_psnr: float | None = None) -> Figure | None:
    """Held-out PSNR (dB) against step, with the classical bake's PSNR as a dashed line."""
    x, y = _series(history, "step", "heldout_psnr")
    if not x:
        return None
    fig, ax = _figure()
    ax.plot(x, y, color=ACCENT, linewidth=1.8, marker="o", markersize=3, label="neural, held-out views")
    if baseline_psnr is not None and math.isfinite(baseline_psnr):
        ax.axhline(baseline_psnr, color=BASE, linestyle="--", linewidth=1.2, label="classical bake")
    ax.set_ylabel("held-out PSNR (dB)", fontsize=9, color=INK)
    ax.legend(fontsize=8, frameon=False)
    return fig


def figure_png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", facecolor="white")
    return buf.getvalue()
