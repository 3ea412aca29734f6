"""Bake the fitted model into one ordinary RGB texture, in linear light.

texture = head + residual, where

* head: the model's per-texel head evaluated in texture space. The head is linear in the
  features, so this is exact: sampling the head texture equals applying the head to sampled
  features (see featuretex.model.decoders).
* residual: what the screen-space decoder adds over the head, rendered at every fitted view,
  reprojected onto the texels that view sees (visibility test, cos x projected-area weights, the
  same `view_samples` as the classical bake) and combined per texel by a robust mean. The decoder
  works before the per-view colour affine (it never sees which view it renders), so its residual
  is already at the reference exposure: nothing of a photo's own exposure reaches the texture.

Robust mean: a weighted median per channel as the start (breakdown point 50 % of the weight, so a
single view with a highlight or a misregistration cannot drag it), then a few iterations of a
Cauchy-weighted mean (IRLS). The median alone picks one view's value per texel and keeps that
view's noise; the reweighted mean averages every view that agrees with the consensus and gives
views far from it a weight that falls to zero (Cauchy's influence redescends), so it keeps the
median's robustness at a lower noise.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from featuretex.bake.config import BakeConfig
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View
from featuretex.settings import check_settings
from featuretex.texels.average import TexelAverage
from featuretex.texels.gutter import fill_texture
from featuretex.texels.sampling import sample_image
from featuretex.texels.visibility import usable_mask, view_samples

MAD_TO_SIGMA = 1.4826    # sigma of Gaussian noise = 1.4826 x median absolute deviation (Hampel 1974)
CAUCHY_C = 2.3849        # Cauchy tuning constant for 95 % efficiency on Gaussian noise (Holland &
                         # Welsch 1977): (E psi')^2 / E psi^2 = 0.95 under N(0, 1), psi(r) = r / (1 + (r/c)^2)


@dataclass
class BakeResult:
    texture_lin: np.ndarray   # (T, T, 3) float32 linear in [0, 1], gutter filled
    seen: np.ndarray          # (T, T) bool: texels at least one fitted view sees (residual measured)
    head_lin: np.ndarray      # (T, T, 3) float32 linear: the exact per-texel head alone
    residual_lin: np.ndarray  # (T, T, 3) float32 linear: the combined residual (0 where unseen)
    weight: np.ndarray        # (T, T) float32 total robust weight of the residual samples


@dataclass
class ResidualSamples:
    """Every (texel, view) observation of the residual."""

    idx: np.ndarray      # (M,) int64 flat texel index
    value: np.ndarray    # (M, 3) float32 residual, linear light
    weight: np.ndarray   # (M,) float64 cos x projected texel area (pixels^2 per scene unit^2)
    view: np.ndarray     # (M,) int32 position of the view in the list of fitted views


def _check(cfg: BakeConfig) -> None:
    check_settings(cfg, "bake.")   # for callers of the bake itself; the command line checked already


def gather_samples(scene: Scene, gbuffers: dict[str, GBuffer], texels: TexelBuffer,
                   residual_of: Callable[[View], np.ndarray] | None, cfg: BakeConfig,
                   views: Iterable[View] | None = None) -> ResidualSamples:
    """Reproject per-view residual images onto the texels each view sees.

    residual_of(view) -> (H, W, 3) float32 linear residual of the render at that view; None
    gathers only where the texels are seen (values 0). views: default the fitted views.
    """
    views = list(scene.manifest.fitted if views is None else views)
    parts: list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]] = []
    for k, view in enumerate(views):
        gbuf = gbuffers[view.name]
        s = view_samples(texels, view, gbuf, usable_mask(scene, view, gbuf, cfg.edge_erode_px),
                         cfg.min_cos, cfg.depth_tol_px)
        if len(s.idx) == 0:
            continue
        if residual_of is None:
            val = np.zeros((len(s.idx), 3), np.float32)
        else:
            val = sample_image(np.asarray(residual_of(view), np.float32), s.xy)
        parts.append((s.idx, val, s.weight, np.full(len(s.idx), k, np.int32)))
    if not parts:
        return ResidualSamples(np.zeros(0, np.int64), np.zeros((0, 3), np.float32), np.zeros(0), np.zeros(0, np.int32))
    idx, val, w, vi = (np.concatenate(p) for p in zip(*parts))
    return ResidualSamples(idx=idx, value=val, weight=w, view=vi)


def weighted_median(idx: np.ndarray, value: np.ndarray, weight: np.ndarray, n: int) -> np.ndarray:
    """(n, C) per-group, per-channel lower weighted median of `value` (M, C) grouped by `idx` (M,)
    in [0, n), with weights (M,) > 0; 0 for groups without samples.

    The lower weighted median is the smallest value whose cumulative weight reaches half the group's.
    """
    out = np.zeros((n, value.shape[1]), np.float64)
    if len(idx) == 0:
        return out
    total = np.bincount(idx, weight, n)
    for c in range(value.shape[1]):
        order = np.lexsort((value[:, c], idx))
        i_s, v_s, w_s = idx[order], value[order, c], weight[order]
        start = np.r_[True, i_s[1:] != i_s[:-1]]
        cw = np.cumsum(w_s)
        base = (cw - w_s)[start]                               # cumulative weight before each group
        within = cw - np.repeat(base, np.diff(np.r_[np.flatnonzero(start), len(i_s)]))
        reached = within >= 0.5 * total[i_s] * (1 - 1e-12)
        first = reached & (start | ~np.r_[False, reached[:-1]])
        out[i_s[first], c] = v_s[first]
    return out


def _weighted_mean(idx: np.ndarray, value: np.ndarray, weight: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    avg = TexelAverage(n, value.shape[1])
    avg.add(idx, value, weight)
    return avg.mean(), avg.wsum


def robust_combine(s: ResidualSamples, n: int, cfg: BakeConfig) -> tuple[np.ndarray, np.ndarray]:
    """(n, 3) float64 combined residual per texel and (n,) final total weight (0 = unseen)."""
    _check(cfg)
    val = s.value.astype(np.float64)
    if cfg.robust == "mean" or len(s.idx) == 0:
        return _weighted_mean(s.idx, val, s.weight, n)
    est = weighted_median(s.idx, val, s.weight, n)
    wsum = np.bincount(s.idx, s.weight, n)
    if cfg.robust == "median":
        return est, wsum
    multi = (np.bincount(s.idx, minlength=n) >= 2)[s.idx]     # texels whose views can disagree
    for _ in range(cfg.iterations):
        d = val - est[s.idx]
        mad = float(np.median(np.abs(d[multi]))) if multi.any() else 0.0
        c = max(CAUCHY_C * MAD_TO_SIGMA * mad, cfg.scale_min)
        r2 = np.mean(d * d, axis=1) / (c * c)                  # RMS over channels, in scale units
        est, wsum = _weighted_mean(s.idx, val, s.weight / (1.0 + r2), n)
    return est, wsum


def exact_support(texels: TexelBuffer) -> np.ndarray:
    """(T, T) bool: texels a bilinear lookup from any surface point can touch (the surface dilated by
    one texel, 8-connected). There the head is kept as fitted, so the bake renders as the model does."""
    return ndimage.binary_dilation(texels.valid, structure=np.ones((3, 3), bool))


def compose_texture(texels: TexelBuffer, head_lin: np.ndarray, samples: ResidualSamples,
                    cfg: BakeConfig) -> BakeResult:
    """head (T, T, 3) linear + robustly combined residual samples -> gutter-filled texture.

    Head: kept on `exact_support`; beyond it the gutter copies the nearest kept texel.
    Residual: measured on seen texels; unseen surface texels get the smooth pull-push fill (no
    step where coverage ends); the gutter copies the nearest surface texel.
    """
    T = texels.size
    if head_lin.shape != (T, T, 3):
        raise ValueError(f"head texture is {head_lin.shape}, texel buffer is {T} x {T}")
    est, wsum = robust_combine(samples, T * T, cfg)
    seen = (wsum > 0).reshape(T, T) & texels.valid
    res = np.where(seen[..., None], est.reshape(T, T, 3), 0.0).astype(np.float32)
    support = exact_support(texels)
    head = fill_texture(np.asarray(head_lin, np.float32), support, support, cfg.gutter)
    res_filled = fill_texture(res, seen, texels.valid, cfg.gutter) if seen.any() else res
    tex = np.clip(head + res_filled, 0.0, 1.0).astype(np.float32)
    return BakeResult(texture_lin=tex, seen=seen, head_lin=np.asarray(head_lin, np.float32), residual_lin=res,
                      weight=wsum.reshape(T, T).astype(np.float32))


def bake_model(scene: Scene, gbuffers: dict[str, GBuffer], texels: TexelBuffer, head_lin: np.ndarray,
               residual_of: Callable[[View], np.ndarray] | None, cfg: BakeConfig | None = None) -> BakeResult:
    """Bake a fitted model into a (T, T, 3) linear texture, T = texels.size.

    The fit's renderer draws what the bake needs and the caller passes it in: head_lin (T, T, 3)
    linear, the model's head on every texel of this size; residual_of(view) -> (H, W, 3) linear,
    what the screen-space decoder adds at a fitted view (None: the model has no screen decoder).
    """
    cfg = cfg or BakeConfig()
    _check(cfg)
    samples = gather_samples(scene, gbuffers, texels, residual_of if cfg.residual else None, cfg)
    return compose_texture(texels, head_lin, samples, cfg)
