"""The diagnosis stage: where the remaining error comes from, per texel and for the scan.

Evidence is gathered on a working UV grid of about one photo pixel per texel (at most
`max_grid`), then resampled to the texture's resolution:
  coverage      usable views per texel                                  (observe.py)
  consistency   patch NCC of the views at the scan surface              (consistency.py)
  sweep         best offset along the normal, NCC plane sweep           (sweep.py)
  alignment     the fit's per-view fields in scene units (if given)     (alignment.py)
  under-fit     residual the views agree on but the texture misses      (underfit.py)
  silhouette    mesh outline against the photo masks, in scene units     (silhouette.py)
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np

from featuretex.diagnose import classify as C
from featuretex.diagnose import payoff as P
from featuretex.diagnose.alignment import alignment_evidence, field_at, global_shift, parse_corrections
from featuretex.diagnose.config import DiagnoseConfig
from featuretex.diagnose.consistency import Samples, consensus, loo_ncc
from featuretex.diagnose.exposure import exposure
from featuretex.diagnose.grid import Resampler, footprint_ratio, texel_areas, texel_edge, working_size
from featuretex.diagnose.numbered import label_map, number_regions
from featuretex.diagnose.observe import Observation, observe
from featuretex.diagnose.silhouette import silhouette_evidence
from featuretex.diagnose.sweep import sweep
from featuretex.diagnose.underfit import consistent_residual, fit_progress, underfit_weight
from featuretex.diagnose.verdict import Evidence, decide, geometry_p90, reasons
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import TexelBuffer, rasterise_uv, texel_uv
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import Scene
from featuretex.texels.sampling import sample_texture

log = logging.getLogger("featuretex")


@dataclass
class Diagnosis:
    """Fields at texture resolution (T, T), NaN where unknown (off the surface, or too few views)."""

    geometry: np.ndarray      # float32 0..1, how strongly the error is explained by geometry/alignment
    texture: np.ndarray       # float32 0..1, texture under-fit
    coverage: np.ndarray      # float32 usable fitted views seeing the texel (NaN off the surface)
    displacement: np.ndarray  # float32 offset along the normal to the photographed surface, scene units
    cls: np.ndarray           # uint8 class (featuretex.diagnose.classify: 0 off, 1 fine, 2 texture,
                              #   3 geometry, 4 uncovered, 5 cavity)
    areas: dict[str, float]   # surface-area fractions: uncovered, geometry_limited, texture_limited
    verdict: str              # rescan | fix-geometry | refine-texture | ready
    reasons: list[str]
    extra: dict[str, np.ndarray] = field(default_factory=dict)   # more (T, T) fields for error_map.npz
    work: dict[str, np.ndarray] = field(default_factory=dict)    # the same on the working grid (D, D)
    figures: dict = field(default_factory=dict)                  # scalars for the summary / report
    regions: list[dict] = field(default_factory=list)            # the numbered regions (summary.json)
    payoff_db: dict = field(default_factory=dict)                # scan: {"geometry", "texture"} dB

    def summary_fields(self) -> dict:
        """The `verdict`, `reasons`, `areas`, `regions` and `payoff_db` entries of summary.json."""
        return {"verdict": self.verdict, "reasons": list(self.reasons),
                "areas": {k: round(float(v), 6) for k, v in self.areas.items()},
                "regions": list(self.regions), "payoff_db": dict(self.payoff_db)}


def diagnose(scene: Scene, gbuffers: dict[str, GBuffer], texels: TexelBuffer, texture_lin: np.ndarray,
             cfg: DiagnoseConfig | None = None, *, corrections: dict | None = None,
             history: dict | list | None = None, texture_footprint_ratio: float | None = None) -> Diagnosis:
    """Diagnose a fitted (or baked) texture on its scan.

    texels: the texture's TexelBuffer (T x T); texture_lin: (T', T', 3) float32 linear albedo (any
    size; normally T); corrections: arrays of fit/corrections.npz (None: judge without them);
    history: fit/history.json (None: unknown); texture_footprint_ratio: texel edge / median photo
    pixel footprint (None: computed here).
    """
    cfg = cfg or DiagnoseConfig()
    T = texels.size
    ratio = texture_footprint_ratio
    if ratio is None or not (ratio > 0 and math.isfinite(ratio)):
        ratio = footprint_ratio(scene, gbuffers, texture_lin.shape[0])
    D = working_size(texture_lin.shape[0], ratio, cfg.min_grid, cfg.max_grid)
    grid = texels if D == T else rasterise_uv(scene.mesh, D)
    size = scene.mesh.extent
    cell = texel_edge(scene.mesh, D)
    corr = parse_corrections(corrections, scene)

    obs = observe(scene, gbuffers, grid, cell, corr, cfg)
    work = evidence(obs, grid, texture_lin, size, cfg)
    if cfg.silhouette and obs:
        sil = silhouette_evidence(scene, gbuffers, grid, cell, cfg)
        if sil is not None:
            work.update(silhouette_offset=sil.offset, silhouette_raw=sil.raw, silhouette_support=sil.support,
                        silhouette_footprint=sil.footprint)
    half = cfg.sweep_units if cfg.sweep_units > 0 else cfg.sweep_fraction * size
    geo_tol = cfg.geometry_tol_units if cfg.geometry_tol_units > 0 else cfg.geometry_tol_fraction * size
    fix_tol = cfg.fix_displacement_units if cfg.fix_displacement_units > 0 else cfg.fix_displacement_fraction * size

    valid = grid.valid
    known = valid & (work["coverage"] >= cfg.min_views)
    progress = fit_progress(history, cfg.tail)
    weight, why = underfit_weight(progress, ratio, cfg)
    # the fields' offset along the normal, not their whole lateral size: a tangential slip is
    # absorbed by the texture, and the normal part is what wrong geometry causes (on the demo with
    # an 800-step fit, AUROC per face 0.82 for |offset| against 0.70 for the lateral RMS)
    align_normal = np.abs(work["align_offset"]) if "align_offset" in work else None
    geometry = C.geometry_field(work["sweep_evidence"], align_normal, geo_tol, known,
                                work.get("silhouette_offset"))
    texture = C.texture_field(work["residual"], work["agreement"], cfg.texture_tol, weight, known)
    hidden = cavities(scene, grid, valid & ~known, cfg)
    cls = C.classify(valid, work["coverage"], geometry, texture, min_views=cfg.min_views,
                     min_region=cfg.min_region, hidden=hidden)
    area = texel_areas(scene.mesh, grid)

    displacement = combined_displacement(work, known)
    magnitude = np.fmax(np.abs(displacement), align_normal if align_normal is not None else np.nan)
    ev = scan_evidence(work, grid, cls, area, displacement, magnitude, ratio, progress, why,
                       len(obs), cfg)
    verdict = decide(ev, cfg, fix_tol)
    words = reasons(verdict, ev, cfg, fix_tol, scene.manifest.unit, scene.manifest.unit_m)
    numbered = number_regions(cls, area, grid.position, hidden, displacement, verdict,
                              per_class=cfg.regions_reported)
    pay = P.estimate(obs, grid.position.reshape(-1, 3).astype(np.float64), grid.normal.reshape(-1, 3).astype(np.float64),
                     area, P.fix_offsets(displacement, known & ~hidden), work["residual"], work["agreement"],
                     P.texture_share(history),
                     P.render_error(scene, gbuffers, texture_lin))
    regions = P.region_entries(numbered, pay)
    words += P.reasons(pay, numbered, regions)

    work.update(geometry=geometry, texture=texture, cls=cls, valid=valid, hidden=hidden, displacement=displacement,
                region=label_map(numbered, cls.shape), loo_se=pay.se.reshape(cls.shape),
                loo_px=pay.pixels.reshape(cls.shape), **P.gain_maps(pay, cls.shape))
    up = Resampler(valid, texels.valid)
    rank = up(C.severity(cls).astype(np.float32), mode="max")    # the most severe class of each block
    cls_t = np.where(texels.valid, C.from_severity(np.nan_to_num(rank, nan=C.severity(C.FINE))), C.OFF
                     ).astype(np.uint8)
    extra = {k: up(work[k]) for k in ("consistency", "consistency_aligned", "residual", "align_misplacement",
                                      "align_offset", "sweep_gain", "sweep_score", "sweep_evidence",
                                      "silhouette_offset", "silhouette_raw") if k in work}
    extra["region"] = up(work["region"].astype(np.float32), mode="max")
    extra.update({k: up(work[k]) for k in ("gain_geometry", "gain_texture")})
    figures = {"working_grid": D, "texture_size": T, "footprint_ratio": float(ratio), "views": len(obs),
               "sweep_half_range": float(half), "geometry_tol": float(geo_tol), "fix_tol": float(fix_tol),
               "geometry_misplacement_p90": ev.geometry_misplacement, "fit_tail_drop": progress.tail_drop,
               "global_shift_px": ev.global_shift_px, "used_alignment": ev.used_alignment,
               "payoff": P.figures(pay)}
    return Diagnosis(geometry=up(geometry), texture=up(texture), coverage=up(work["coverage"]),
                     displacement=up(displacement), cls=cls_t, areas=ev.areas, verdict=verdict, reasons=words,
                     extra=extra, work=work, figures=figures, regions=regions, payoff_db=pay.over())


def combined_displacement(work: dict[str, np.ndarray], known: np.ndarray) -> np.ndarray:
    """(D, D) float32 scene units: the sweep's offset where it is confident; else the alignment
    fields' offset where it is significant; else the silhouettes' offset where it exceeds one
    outline pixel (below that it is mask quantisation); NaN elsewhere."""
    displacement = work["sweep_offset"].copy()
    if "align_significant" in work:
        fill = ~np.isfinite(displacement) & work["align_significant"] & known
        displacement[fill] = work["align_offset"][fill]
    if "silhouette_offset" in work:
        s = work["silhouette_offset"]
        with np.errstate(invalid="ignore"):
            big = np.abs(s) >= work["silhouette_footprint"]
        fill = ~np.isfinite(displacement) & big & known
        displacement[fill] = s[fill]
    return displacement


def scan_evidence(work: dict[str, np.ndarray], grid: TexelBuffer, cls: np.ndarray, area: np.ndarray,
                  displacement: np.ndarray, magnitude: np.ndarray, ratio: float,
                  progress, why: list[str], views: int, cfg: DiagnoseConfig) -> Evidence:
    """Scan-level figures (areas, largest regions, misplacement, residual) for the verdict."""
    pos = grid.position.astype(np.float64)
    top = cfg.regions_reported
    tex = cls == C.TEXTURE
    return Evidence(
        areas=C.area_fractions(cls, area),
        geometry_regions=C.regions(cls == C.GEOMETRY, area, pos, displacement, magnitude, top),
        uncovered_regions=C.regions(cls == C.UNCOVERED, area, pos, displacement, magnitude, 1),
        texture_regions=C.regions(tex, area, pos, displacement, magnitude, top),
        geometry_misplacement=geometry_p90(magnitude[cls == C.GEOMETRY]),
        texture_residual=float(np.nanmedian(work["residual"][tex])) if tex.any() else 0.0,
        footprint_ratio=float(ratio), progress=progress, underfit_why=why,
        global_shift_px=float(work.get("global_shift_px", 0.0)),
        global_shift_units=float(work.get("global_shift_units", 0.0)),
        used_alignment="align_offset" in work, views=views)


def evidence(obs: list[Observation], grid: TexelBuffer, texture_lin: np.ndarray, size: float,
             cfg: DiagnoseConfig) -> dict[str, np.ndarray]:
    """Every per-texel signal on the working grid, as (D, D) float32 arrays (NaN where unknown)."""
    D = grid.size
    N = D * D
    pos = grid.position.reshape(-1, 3).astype(np.float64)
    nrm = grid.normal.reshape(-1, 3).astype(np.float64)
    cov = np.zeros(N, np.float32)
    for o in obs:
        cov[o.seen] += 1.0
    out: dict[str, np.ndarray] = {"coverage": np.where(grid.valid, cov.reshape(D, D), np.nan).astype(np.float32)}
    shape = lambda a: np.asarray(a, np.float32).reshape(D, D)  # noqa: E731
    if not obs:
        nan = np.full((D, D), np.nan, np.float32)
        out.update(sweep_offset=nan, sweep_evidence=nan, residual=nan, agreement=nan, consistency=nan)
        return out

    half = cfg.sweep_units if cfg.sweep_units > 0 else cfg.sweep_fraction * size
    for o in obs:      # judge the surface with each view's calibration shift taken out
        f = o.correction.field if o.correction is not None else None
        if f is not None and cfg.align_remove_global:
            o.shift = global_shift(f, o.xy, o.view.camera.width, o.view.camera.height)
    sw = sweep(obs, pos, nrm, D, half, cfg)
    out.update(sweep_offset=shape(sw.displacement), sweep_evidence=shape(sw.evidence), sweep_gain=shape(sw.gain), sweep_score=shape(sw.best_score),
                   consistency=shape(sw.score0))

    al = alignment_evidence(obs, pos, nrm, N, remove_global=cfg.align_remove_global, ridge=0.1)
    aligned_xy = {}
    if al is not None:
        out.update(align_misplacement=shape(al.misplacement), align_offset=shape(al.offset),
                   align_significant=al.significant.reshape(D, D))
        shifts = np.array(list(al.global_px.values()))
        out["global_shift_px"] = np.float32(np.median(shifts))
        fp = np.median(np.concatenate([o.depth / o.focal for o in obs]))
        out["global_shift_units"] = np.float32(np.median(shifts) * fp)
        aligned_xy = aligned_positions(obs)
        views = [Samples(o.idx, o.sample_grey(aligned_xy[o.view.name]), o.cos) for o in obs]
        s, _ = loo_ncc(views, D, patch=cfg.patch, min_fill=cfg.min_patch_fill, min_contrast=cfg.min_contrast, trim=cfg.trim)
        out["consistency_aligned"] = shape(s)

    # consensus of the (aligned, colour-corrected) photos against the texture, in sRGB
    views = [Samples(o.idx, linear_to_srgb(o.sample_colour(aligned_xy.get(o.view.name, o.xy))), o.cos)
             for o in obs]
    mean, var, w = consensus(views, N)
    seen = (w > 0).reshape(D, D) & grid.valid
    tex = linear_to_srgb(texture_at(texture_lin, D)).reshape(D, D, 3)
    res = consistent_residual(np.nan_to_num(mean).reshape(D, D, 3), tex, np.nan_to_num(var).reshape(D, D),
                              seen, cfg.patch)
    out.update(residual=res.residual, agreement=res.agreement, spread=res.spread)
    return out


def cavities(scene: Scene, grid: TexelBuffer, uncovered: np.ndarray, cfg: DiagnoseConfig) -> np.ndarray:
    """(D, D) bool: uncovered texels whose exposure is below min_exposure (inside cavities)."""
    out = np.zeros(uncovered.shape, bool)
    if uncovered.any():
        e = exposure(scene.mesh, grid.position[uncovered].astype(np.float64),
                     grid.normal[uncovered].astype(np.float64), cfg.exposure_rays)
        out[uncovered] = e < cfg.min_exposure
    return out


def aligned_positions(obs: list[Observation]) -> dict[str, np.ndarray]:
    """Per view, pixel coords where the fit's alignment says each texel really shows: xy + d(xy)."""
    out = {}
    for o in obs:
        f = o.correction.field if o.correction is not None else None
        if f is None:
            out[o.view.name] = o.xy
        else:
            cam = o.view.camera
            out[o.view.name] = o.xy + field_at(f, o.xy, cam.width, cam.height)
    return out


def texture_at(texture_lin: np.ndarray, D: int) -> np.ndarray:
    """(D*D, 3) float32 the texture seen at the working grid's texel centres: block means when the
    texture is finer (so both hold detail at the same scale), bilinear lookups otherwise."""
    T = texture_lin.shape[0]
    if T > D and T % D == 0:
        k = T // D
        return texture_lin.reshape(D, k, D, k, 3).mean(axis=(1, 3)).reshape(-1, 3).astype(np.float32)
    return sample_texture(texture_lin, texel_uv(D).reshape(-1, 2))

