"""The verdict for a scan and its reasons in plain words, with numbers and units.

Rules (thresholds in DiagnoseConfig), first match wins:
  rescan          uncovered surface outside cavities > rescan_uncovered, or geometry-limited > rescan_geometry
  fix-geometry    geometry-limited > fix_geometry_area and its misplacement > the fix tolerance
                  (texture fitting cannot repair geometry, so this comes before refine-texture)
  refine-texture  texture-limited > refine_texture_area and >= refine_dominance x geometry-limited
  ready           otherwise
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from featuretex.diagnose.classify import Region
from featuretex.diagnose.config import DiagnoseConfig
from featuretex.diagnose.underfit import FitProgress

VERDICTS = ("rescan", "fix-geometry", "refine-texture", "ready")


@dataclass
class Evidence:
    """Scan-level figures the rules and reasons read."""

    areas: dict[str, float]
    geometry_regions: list[Region]
    uncovered_regions: list[Region]
    texture_regions: list[Region]
    geometry_misplacement: float      # 90th pct misplacement over geometry-limited texels, scene units
    texture_residual: float           # median consistent residual over texture-limited texels, sRGB
    footprint_ratio: float            # texture texel / photo pixel
    progress: FitProgress
    underfit_why: list[str]
    global_shift_px: float            # median over views of the fit's whole-view shift, px
    global_shift_units: float         # the same in scene units at the object
    used_alignment: bool
    views: int
    extras: dict = field(default_factory=dict)


def length(value: float, unit: str, unit_m: float) -> str:
    """A length in scene units as text: metric scenes in mm / cm / m, others in their own unit."""
    if not math.isfinite(value):
        return "an unknown distance"
    metric = unit in ("meter", "metre", "m", "centimeter", "centimetre", "cm", "millimeter", "millimetre", "mm")
    if not metric:
        return f"{value:.3g} {unit}"
    m = value * unit_m
    a = abs(m)
    if a < 0.01:
        return f"{m * 1000:.1f} mm"
    if a < 1.0:
        return f"{m * 100:.1f} cm"
    return f"{m:.2f} m"


SYMBOLS = {"meter": "m", "metre": "m", "centimeter": "cm", "centimetre": "cm", "millimeter": "mm",
           "millimetre": "mm", "inch": "in", "foot": "ft"}


def where(r: Region, unit: str, unit_m: float) -> str:
    """The region's area-weighted centre in the scan's own axes, as lengths a person reads."""
    x, y, z = (length(float(c), unit, unit_m) for c in r.centre)
    return f"around x {x}, y {y}, z {z}"


def pct(x: float) -> str:
    return f"{100 * x:.1f} %"


def open_uncovered(areas: dict[str, float]) -> float:
    """Uncovered surface outside cavities (what more photos could cover)."""
    return areas["uncovered"] - areas.get("uncovered_hidden", 0.0)


def decide(ev: Evidence, cfg: DiagnoseConfig, fix_tol: float) -> str:
    a = ev.areas
    if open_uncovered(a) > cfg.rescan_uncovered or a["geometry_limited"] > cfg.rescan_geometry:
        return "rescan"
    if a["geometry_limited"] > cfg.fix_geometry_area and ev.geometry_misplacement > fix_tol:
        return "fix-geometry"
    if (a["texture_limited"] > cfg.refine_texture_area
            and a["texture_limited"] >= cfg.refine_dominance * a["geometry_limited"]):
        return "refine-texture"
    return "ready"


def reasons(verdict: str, ev: Evidence, cfg: DiagnoseConfig, fix_tol: float, unit: str, unit_m: float
            ) -> list[str]:
    """Plain sentences, most important first."""
    L = lambda v: length(v, unit, unit_m)  # noqa: E731
    a = ev.areas
    out: list[str] = []
    ou = open_uncovered(a)
    if ou > 0 and (verdict == "rescan" or ou > 0.2 * cfg.rescan_uncovered):
        r = ev.uncovered_regions[0] if ev.uncovered_regions else None
        spot = f", mostly {where(r, unit, unit_m)}," if r is not None else ""
        act = "photograph it before anything else" if ou > cfg.rescan_uncovered else "below the rescan limit"
        out.append(f"{pct(ou)} of the surface{spot} was seen by fewer than {cfg.min_views} usable "
                   f"photos (rescan limit {pct(cfg.rescan_uncovered)}): {act}")
    if a.get("uncovered_hidden", 0.0) > 0.001:
        out.append(f"{pct(a['uncovered_hidden'])} of the surface lies in cavities no outside camera sees well "
                   f"(open to less than {pct(cfg.min_exposure)} of its hemisphere): not counted towards a rescan")
    if a["geometry_limited"] > 0:
        for r in ev.geometry_regions:
            if r.fraction < 0.2 * cfg.fix_geometry_area:
                continue
            if math.isfinite(r.offset):
                side = "outside" if r.offset > 0 else "inside"
                what = (f"sits {L(abs(r.offset))} (up to {L(abs(r.peak))}) off the photographed surface: "
                        f"the photos see the surface {side} the mesh")
            else:
                what = f"is misplaced by about {L(r.misplacement)} against the photos"
            out.append(f"{pct(r.fraction)} of the surface, {where(r, unit, unit_m)}, {what}")
        if verdict == "rescan" and a["geometry_limited"] > cfg.rescan_geometry:
            out.append(f"{pct(a['geometry_limited'])} of the surface is geometry-limited, more than a fix can "
                       f"recover (limit {pct(cfg.rescan_geometry)})")
        elif a["geometry_limited"] > cfg.fix_geometry_area:
            out.append(f"geometry-limited surface {pct(a['geometry_limited'])} exceeds {pct(cfg.fix_geometry_area)} "
                       f"with misplacement up to {L(ev.geometry_misplacement)} (tolerance {L(fix_tol)}): "
                       "more texture fitting cannot fix this")
    if ev.global_shift_px > 1.0:
        out.append(f"the fit shifted the photos by a median {ev.global_shift_px:.1f} px "
                   f"(about {L(ev.global_shift_units)} at the object) as a whole: the camera calibration is off")
    if a["texture_limited"] > 0.1 * cfg.refine_texture_area:
        why = []
        if "coarse" in ev.underfit_why:
            why.append(f"a texel is {ev.footprint_ratio:.1f}x a photo pixel, so a larger texture would hold it")
        if "falling" in ev.underfit_why:
            why.append(f"the fit was still improving (loss fell {pct(ev.progress.tail_drop)} over its last "
                       f"{pct(cfg.tail)} of {ev.progress.steps} steps): fit longer")
        tail = "; ".join(why) if why else "refining the texture should reduce it"
        out.append(f"{pct(a['texture_limited'])} of the surface shows detail the photos agree on but the texture "
                   f"misses (residual {ev.texture_residual:.3f} sRGB RMS); {tail}")
    if verdict == "ready":
        out.append(f"the photos agree with the mesh and the texture: {pct(ou)} uncovered, "
                   f"{pct(a['geometry_limited'])} geometry-limited (limit {pct(cfg.fix_geometry_area)}), "
                   f"{pct(a['texture_limited'])} texture-limited (limit {pct(cfg.refine_texture_area)})")
    if not ev.used_alignment:
        out.append("judged without the fit's alignment fields (photo consistency and the sweep only)")
    return out


def geometry_p90(values: np.ndarray) -> float:
    v = values[np.isfinite(values)]
    return float(np.percentile(v, 90)) if len(v) else 0.0
