"""What each kind of fix would gain, in dB of held-out PSNR, estimated from the fitted views only.

Held-out photos never enter: every fitted view stands in for an unseen one in turn (leave one
out). For a texel p seen by view v, the "texture" an unseen view would get is the consensus of the
OTHER fitted views there (colour-corrected to the common albedo scale, weighted like the classical
bake), and what view v's photo shows is compared with it as the held-out scores compare a render
with a photo: sRGB-encoded, the photo with its own exposure (no correction: a held-out photo gets
none), no alignment. Weighted by the pixels the texel covers in v (surface area x cos x (f/z)^2),
these squared errors say where a fix changes what unseen views see, texel by texel.

geometry  the same sum with the surface moved by `offset` along the normal (the views sample
          where they see p + offset n), over the texels an offset is given for: the drop in SE is
          what fixing the geometry there recovers in views no fit has seen.
texture   the residual the (aligned, colour-corrected) views agree on but the texture misses
          (featuretex.diagnose.underfit), squared, times the share of it the views agree on, over
          the pixels it covers, times the share of it a fit as long again removes. That share comes
          from the fit's own loss curve: if the loss's excess over its limit falls as a power of
          the step count, L(s) - L_inf = B s^-a, the drop over the second half of the fit is 2^-a
          times the drop over the quarter before it, and doubling the steps removes 1 - 2^-a of
          the excess left (0 when the loss had stopped falling; 1 when the history is unknown).

The scale they are measured against is the error of the whole image: the baked texture rendered
plainly at every fitted view (no alignment, reference exposure: as a held-out view is scored) against
its photo inside the object mask, SE over P pixels. This counts what the texel sums leave out
(silhouettes, grazing views, the calibration error of each pose), which no fix of the surface or of
the texture removes. A drop dSE is worth 10 log10(SE / (SE - dSE)) dB of held-out PSNR; the
regions' payoffs add up (to first order) to the scan's.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from featuretex.diagnose.observe import Observation
from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import Scene
from featuretex.scoring.render import render_texture
from featuretex.texels.visibility import usable_mask


@dataclass
class Payoff:
    """Squared errors on the working grid (flat, D*D), in sRGB^2 x pixels."""

    se: np.ndarray             # (D*D,) leave-one-out squared error with the surface as it is
    pixels: np.ndarray         # (D*D,) pixels the texel covers, summed over the views that judge it
    geometry_gain: np.ndarray  # (D*D,) drop of `se` with the surface moved by the fix offsets
    texture_gain: np.ndarray   # (D*D,) drop of `se` a fit as long again is expected to bring
    texture_share: float       # share of the agreed residual a fit as long again removes (0..1)
    render_se: float = 0.0     # squared error of the plain render of the texture at the fitted views
    render_pixels: float = 0.0  # pixels it is summed over

    @property
    def total(self) -> float:
        return self.render_se

    def db(self, drop: float) -> float:
        """A drop of the scan's squared error in dB of its PSNR (negative: the change costs)."""
        se = self.total
        if se <= 0:
            return 0.0
        return 10.0 * math.log10(se / max(se - drop, 0.05 * se))

    def over(self, mask: np.ndarray | None = None) -> dict[str, float]:
        """{"geometry", "texture"}: dB for fixing inside `mask` ((D, D) bool; None = everywhere)."""
        m = slice(None) if mask is None else mask.ravel()
        return {"geometry": round(self.db(float(self.geometry_gain[m].sum())), 3),
                "texture": round(self.db(float(self.texture_gain[m].sum())), 3)}

    @property
    def loo_mse(self) -> float:
        px = float(self.pixels.sum())
        return float(self.se.sum()) / px if px > 0 else float("nan")

    @property
    def render_mse(self) -> float:
        return self.render_se / self.render_pixels if self.render_pixels > 0 else float("nan")


def loo_squared_error(obs: list[Observation], pos: np.ndarray, nrm: np.ndarray, area: np.ndarray,
                      offset: np.ndarray | None = None, subset: np.ndarray | None = None
                      ) -> tuple[np.ndarray, np.ndarray]:
    """(se, pixels), each (N,) float64 over the N working texels: leave-one-out squared error of the
    views at p + offset n (see module doc). pos, nrm: (N, 3) positions (scene units) and unit
    normals; area: (N,) texel areas, scene units^2; offset: (N,) scene units (None: 0);
    subset: (N,) bool texels to evaluate (others stay 0). Visibility is that at the scan surface."""
    N = len(pos)
    S = np.zeros((N, 3))
    W = np.zeros(N)
    taken = []
    for o in obs:
        keep = np.ones(len(o.idx), bool) if subset is None else subset[o.idx]
        idx = o.idx[keep]
        if not len(idx):
            continue
        pc = o.view.to_camera(pos[idx])
        if offset is not None:
            q = pc + offset[idx, None] * (nrm[idx] @ o.view.R.T)
            pc = np.where(q[:, 2:3] > 1e-9, q, pc)
        albedo = o.sample_colour(o.view.camera.project(pc)).astype(np.float64)
        ppu = o.focal / o.depth[keep]                                # pixels per scene unit
        w = o.cos[keep].astype(np.float64) * ppu ** 2                # as the classical bake weighs views
        S[idx] += w[:, None] * albedo
        W[idx] += w
        taken.append((o, idx, albedo, w, area[idx] * w))
    se = np.zeros(N)
    px = np.zeros(N)
    for o, idx, albedo, w, pixels in taken:
        rest = W[idx] - w
        ok = rest > 1e-12 * W[idx]
        if not ok.any():
            continue
        pred = (S[idx[ok]] - w[ok, None] * albedo[ok]) / rest[ok, None]
        photo = _as_photographed(o, albedo[ok])
        e = ((linear_to_srgb(np.clip(photo, 0, 1)) - linear_to_srgb(np.clip(pred, 0, 1))) ** 2).mean(1)
        np.add.at(se, idx[ok], pixels[ok] * e)
        np.add.at(px, idx[ok], pixels[ok])
    return se, px


def _as_photographed(o: Observation, albedo: np.ndarray) -> np.ndarray:
    """(N, 3) the photo's own values: the fit's colour correction (photo ~ M albedo + b) undone."""
    c = o.correction
    if c is None:
        return albedo
    return albedo @ c.matrix.astype(np.float64).T + c.bias.astype(np.float64)


def texture_share(history: dict | list | None) -> float:
    """Share (0..1) of the loss's excess a fit as long again removes, 1 - r with r = (L(s/2) - L(s))
    / (L(s/4) - L(s/2)) from the fit's loss history (linear between recorded steps); 1 when the
    history does not reach back to a quarter of the fit."""
    from featuretex.diagnose.underfit import _series

    steps, loss = _series(history)
    if len(loss) < 3:
        return 1.0
    order = np.argsort(steps, kind="stable")
    steps, loss = steps[order], loss[order]
    s = steps[-1]
    if s / 4 < steps[0]:
        return 1.0
    l4, l2, l1 = np.interp([s / 4, s / 2, s], steps, loss)
    early, late = l4 - l2, l2 - l1
    if early <= 0:
        return 0.0 if late <= 0 else 1.0
    return float(np.clip(1.0 - late / early, 0.0, 1.0))


def render_error(scene: Scene, gbuffers: dict[str, GBuffer], texture_lin: np.ndarray) -> tuple[float, float]:
    """(squared error, pixels) of `texture_lin` (T, T, 3) linear rendered at every fitted view through
    its G-buffer against the photo inside G-buffer coverage and photo mask, sRGB-encoded."""
    se = px = 0.0
    for view in scene.manifest.fitted:
        gb = gbuffers[view.name]
        m = usable_mask(scene, view, gb)
        if not m.any():
            continue
        r = linear_to_srgb(render_texture(gb, scene.mesh, texture_lin)[m])
        p = linear_to_srgb(scene.photo(view)[m])
        se += float(((r - p) ** 2).mean(1).sum())
        px += float(m.sum())
    return se, px


def estimate(obs: list[Observation], pos: np.ndarray, nrm: np.ndarray, area: np.ndarray,
             fix_offset: np.ndarray, residual: np.ndarray, agreement: np.ndarray, share: float,
             render: tuple[float, float]) -> Payoff:
    """The payoff of each fix on the working grid (flat arrays of N = D*D texels).

    fix_offset: (N,) offsets along the normal the geometry fix would apply, scene units (0 or NaN:
    none); residual, agreement: (N,) the under-fit residual (sRGB RMS) and its agreed share;
    render: (squared error, pixels) of `render_error`."""
    N = len(pos)
    a = np.nan_to_num(np.asarray(area, np.float64).ravel())
    se0, px = loo_squared_error(obs, pos, nrm, a)
    t = np.nan_to_num(np.asarray(fix_offset, np.float64).ravel())
    moved = t != 0
    geo = np.zeros(N)
    if moved.any():
        se1, _ = loo_squared_error(obs, pos, nrm, a, offset=t, subset=moved)
        geo[moved] = se0[moved] - se1[moved]
    r = np.nan_to_num(np.asarray(residual, np.float64).ravel())
    ag = np.nan_to_num(np.asarray(agreement, np.float64).ravel())
    tex = share * r * r * ag * px
    return Payoff(se=se0, pixels=px, geometry_gain=geo, texture_gain=tex, texture_share=share,
                  render_se=render[0], render_pixels=render[1])


def fix_offsets(displacement: np.ndarray, movable: np.ndarray) -> np.ndarray:
    """(D, D) float64 the offsets a geometry fix would apply: the diagnosis's displacement where it
    is measured and the surface may move (`movable`), else 0."""
    d = np.where(movable & np.isfinite(displacement), displacement, 0.0)
    return d.astype(np.float64)


def region_entries(regions: list, pay: Payoff) -> list[dict]:
    """summary.json `regions`: number, class, share (of the surface), area (scene units^2), centre
    (area-weighted mean position, scene units), marker (a surface point inside the region, scene
    units), offset (median along the normal, scene units, None unknown), payoff_db."""
    out = []
    for r in regions:
        out.append({"number": r.number, "class": r.name, "share": round(r.share, 6), "area": float(r.area),
                    "centre": [round(float(c), 6) for c in r.centre],
                    "marker": [round(float(c), 6) for c in r.marker],
                    "offset": round(r.offset, 6) if math.isfinite(r.offset) else None,
                    "payoff_db": pay.over(r.mask)})
    return out


def _db(x: float) -> str:
    x = round(x, 1) + 0.0          # no "-0.0"
    return f"{x:+.1f} dB"


def reasons(pay: Payoff, regions: list, entries: list[dict]) -> list[str]:
    """Sentences quoting both estimates, for the scan and each numbered geometry or texture region."""
    if pay.total <= 0:
        return []
    scan = pay.over()
    out = [f"estimated from the fitted views (each standing in for an unseen one): fixing the geometry "
           f"everywhere it is measured would gain about {_db(scan['geometry'])} of held-out PSNR; fitting the "
           f"texture as long again about {_db(scan['texture'])}"]
    for r, e in zip(regions, entries):
        if r.name == "uncovered":
            continue
        p = e["payoff_db"]
        which = "the geometry fix pays more" if p["geometry"] > p["texture"] else "a longer fit pays more"
        out.append(f"region {r.number} ({r.name}-limited, {100 * r.share:.1f} % of the surface): fixing the "
                   f"geometry here: about {_db(p['geometry'])}; fitting longer: about {_db(p['texture'])} "
                   f"({which})")
    return out


def gain_maps(pay: Payoff, shape: tuple[int, int]) -> dict[str, np.ndarray]:
    """(D, D) float32 per-pixel squared-error drops (sRGB^2): `gain_geometry`, `gain_texture`."""
    px = np.maximum(pay.pixels, 1e-30)
    seen = pay.pixels > 0
    return {k: np.where(seen, v / px, np.nan).reshape(shape).astype(np.float32)
            for k, v in (("gain_geometry", pay.geometry_gain), ("gain_texture", pay.texture_gain))}


def figures(pay: Payoff) -> dict:
    """Scalars for summary.json's diagnosis figures."""
    loo, plain = pay.loo_mse, pay.render_mse
    return {"loo_psnr": 10.0 * math.log10(1.0 / loo) if loo > 0 else None,
            "fitted_plain_psnr": 10.0 * math.log10(1.0 / plain) if plain > 0 else None,
            "texture_share": pay.texture_share, **{f"scan_{k}_db": v for k, v in pay.over().items()}}
