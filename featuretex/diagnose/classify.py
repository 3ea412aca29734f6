"""From evidence to per-texel fields in 0..1, a class per texel, surface-area fractions and regions."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

# texel classes as stored in error_map.npz `cls` (codes are stable; CAVITY came last)
OFF, FINE, TEXTURE, GEOMETRY, UNCOVERED, CAVITY = 0, 1, 2, 3, 4, 5
CLASS_NAMES = {OFF: "off-surface", FINE: "fine", TEXTURE: "texture-limited", GEOMETRY: "geometry-limited",
               UNCOVERED: "uncovered", CAVITY: "cavity"}
# least to most severe: when a coarser grid pools several texels, the most severe class wins (a
# cavity asks nothing of anyone, so any other problem in the block outranks it)
SEVERITY = (OFF, FINE, CAVITY, TEXTURE, GEOMETRY, UNCOVERED)
_RANK = np.argsort(SEVERITY).astype(np.uint8)        # class code -> severity rank


def severity(cls: np.ndarray) -> np.ndarray:
    """Class codes -> severity ranks (same shape, uint8): pool ranks with max, map back with `from_severity`."""
    return _RANK[np.asarray(cls, np.intp)]


def from_severity(rank: np.ndarray) -> np.ndarray:
    """Severity ranks -> class codes (uint8)."""
    return np.asarray(SEVERITY, np.uint8)[np.asarray(rank, np.intp)]


def ramp(x: np.ndarray) -> np.ndarray:
    """x^2 / (1 + x^2): 0 at 0, 0.5 at the tolerance (x = 1), towards 1 beyond; NaN stays NaN."""
    x2 = np.asarray(x, np.float64) ** 2
    return (x2 / (1.0 + x2)).astype(np.float32)


def geometry_field(sweep_mag: np.ndarray, align_mag: np.ndarray | None, tol: float,
                   known: np.ndarray, silhouette_mag: np.ndarray | None = None) -> np.ndarray:
    """(D, D) float32 in 0..1: the largest misplacement of the sweep (its graded evidence, scene
    units), of the alignment fields (|offset along the normal|) and of the silhouettes (|offset
    along the normal|), over the tolerance, through `ramp`; NaN where not `known`."""
    e = np.where(np.isfinite(sweep_mag), np.abs(sweep_mag), 0.0)
    for extra in (align_mag, silhouette_mag):
        if extra is not None:
            e = np.maximum(e, np.where(np.isfinite(extra), np.abs(extra), 0.0))
    return np.where(known, ramp(e / tol), np.nan).astype(np.float32)


def texture_field(residual: np.ndarray, agreement: np.ndarray, tol: float, weight: float,
                  known: np.ndarray) -> np.ndarray:
    """(D, D) float32 in 0..1: ramp(residual / tol) x the share of it the views agree on x weight."""
    r = np.where(np.isfinite(residual), residual, 0.0)
    a = np.where(np.isfinite(agreement), agreement, 0.0)
    return np.where(known, ramp(r / tol) * a * weight, np.nan).astype(np.float32)


def drop_small(mask: np.ndarray, min_size: int) -> np.ndarray:
    """mask without 8-connected components smaller than min_size texels (isolated false alarms)."""
    if min_size <= 1 or not mask.any():
        return mask
    lab, n = ndimage.label(mask, structure=np.ones((3, 3)))
    sizes = np.bincount(lab.ravel(), minlength=n + 1)
    keep = sizes >= min_size
    keep[0] = False
    return keep[lab]


def classify(valid: np.ndarray, coverage: np.ndarray, geometry: np.ndarray, texture: np.ndarray, *,
             min_views: int, min_region: int, hidden: np.ndarray | None = None) -> np.ndarray:
    """(D, D) uint8 class per texel (OFF, FINE, TEXTURE, GEOMETRY, UNCOVERED, CAVITY); hidden: (D, D)
    bool, surface in cavities no outside camera reaches: CAVITY where it is uncovered."""
    cls = np.where(valid, FINE, OFF).astype(np.uint8)
    uncovered = valid & ~(coverage >= min_views)
    known = valid & ~uncovered
    geo = drop_small(known & (np.nan_to_num(geometry) >= 0.5), min_region)
    tex = drop_small(known & ~geo & (np.nan_to_num(texture) >= 0.5), min_region)
    cls[tex] = TEXTURE
    cls[geo] = GEOMETRY
    cls[uncovered] = UNCOVERED
    if hidden is not None:
        cls[uncovered & hidden] = CAVITY
    return cls


def area_fractions(cls: np.ndarray, area: np.ndarray) -> dict[str, float]:
    """Surface-area fractions of the classes that matter; area: (D, D) texel areas (0 off surface).
    `uncovered` counts every surface too few views saw, cavities included; `uncovered_hidden` is
    the cavity part of it."""
    total = float(area[cls != OFF].sum())

    def frac(m: np.ndarray) -> float:
        return float(area[m].sum()) / total if total > 0 else 0.0
    return {"uncovered": frac((cls == UNCOVERED) | (cls == CAVITY)), "geometry_limited": frac(cls == GEOMETRY),
            "texture_limited": frac(cls == TEXTURE), "uncovered_hidden": frac(cls == CAVITY)}


@dataclass
class Region:
    """One connected patch of a class on the working grid."""

    fraction: float            # of the surface area
    centre: np.ndarray         # (3,) area-weighted mean position, scene units
    offset: float              # median signed displacement inside (NaN when none measured), scene units
    peak: float                # signed displacement at the 95th percentile of its magnitude, scene units
    misplacement: float        # 90th percentile of the misplacement magnitude inside, scene units


def regions(mask: np.ndarray, area: np.ndarray, pos: np.ndarray, displacement: np.ndarray,
            magnitude: np.ndarray, top: int) -> list[Region]:
    """The `top` largest 8-connected regions of mask (D, D) by surface area; pos (D, D, 3)."""
    if not mask.any():
        return []
    lab, n = ndimage.label(mask, structure=np.ones((3, 3)))
    total = float(area[np.isfinite(area)].sum())
    sums = ndimage.sum_labels(area, lab, index=np.arange(1, n + 1))
    out = []
    for k in np.argsort(-sums)[:top]:
        m = lab == k + 1
        a = area[m]
        d = displacement[m]
        d = d[np.isfinite(d)]
        e = magnitude[m]
        e = e[np.isfinite(e)]
        out.append(Region(fraction=float(a.sum()) / total if total > 0 else 0.0,
                          centre=(pos[m] * a[:, None]).sum(0) / max(float(a.sum()), 1e-30),
                          offset=float(np.median(d)) if len(d) else float("nan"),
                          peak=_peak(d),
                          misplacement=float(np.percentile(e, 90)) if len(e) else float("nan")))
    return out


def _peak(d: np.ndarray) -> float:
    """Signed value at the 95th percentile of |d| (robust to a few stray texels); NaN if empty."""
    if not len(d):
        return float("nan")
    order = np.argsort(np.abs(d))
    return float(d[order[min(len(d) - 1, int(0.95 * len(d)))]])
