"""The jug's hand-painted albedo in the true mesh's uv layout: bands, flowers, a zigzag on the raised
band, two lines of fine lettering-like strokes and iron speckles in the glaze, painted in linear RGB
from signed distances (anti-aliased over a texel)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import PchipInterpolator
from scipy.ndimage import map_coordinates

from featuretex.demo.config import DemoConfig
from featuretex.demo.geometry import (BAND_Z, BOTTOM, FLOOR, FOOT_PART, HANDLE_HALF, INNER, INNER_UV_WEIGHT, LIP,
                                      OUTER, V_BODY, V_HANDLE0, V_HANDLE1, WALL_R, WALL_Z, body_theta,
                                      dense_profile, handle_frame, uv_measure)
from featuretex.scene.colour import linear_to_srgb, srgb_to_linear, to_uint8
from featuretex.synth import fine_print_coverage

SRGB = {  # glaze and pigment colours, sRGB-encoded
    "glaze": (0.94, 0.90, 0.81), "clay": (0.76, 0.55, 0.42), "cobalt": (0.13, 0.24, 0.58),
    "cobalt_dark": (0.07, 0.13, 0.38), "ochre": (0.86, 0.63, 0.21), "green": (0.27, 0.47, 0.27),
    "manganese": (0.36, 0.22, 0.14), "speck": (0.42, 0.30, 0.22),
}


def _lin(name: str) -> np.ndarray:
    return srgb_to_linear(np.array(SRGB[name]))


@dataclass


class _Canvas:
    """Rows of the body texture with the surface coordinates of their texels, painted in linear RGB.

    Along a row only the azimuth changes, so per-row quantities are (R, 1) and per-column (1, T).
    """

    rgb: np.ndarray     # (R, T, 3) float32 linear
    px: np.ndarray      # (R, 1) or (R, T) texel size, mm (anti-aliasing width)
    theta: np.ndarray   # (1, T) azimuth from +x, radians in [0, 2 pi)
    z: np.ndarray       # (R, 1) height, mm
    r: np.ndarray       # (R, 1) radius of the true profile, mm
    part: np.ndarray    # (R, 1) profile part

    def rows(self, keep: np.ndarray) -> "_Canvas":
        """A copy of the rows where `keep` (R,) holds; paint it, then `put` it back."""
        return _Canvas(self.rgb[keep], self.px[keep], self.theta, self.z[keep], self.r[keep], self.part[keep])

    def put(self, keep: np.ndarray, sub: "_Canvas") -> None:
        self.rgb[keep] = sub.rgb

    def band_rows(self, z0: float, z1: float, parts=(OUTER,)) -> np.ndarray:
        """(R,) rows of the given parts with z0 <= z <= z1 (mm)."""
        return (np.isin(self.part[:, 0], parts) & (self.z[:, 0] >= z0) & (self.z[:, 0] <= z1))

    def around(self, theta0: float) -> np.ndarray:
        """(R, T) arc distance (mm) around the jug from azimuth theta0, in (-pi r, pi r]."""
        return ((self.theta - theta0 + np.pi) % (2 * np.pi) - np.pi) * self.r

    def cover(self, sdf_mm: np.ndarray) -> np.ndarray:
        """Coverage of a shape from its signed distance (mm, < 0 inside), smoothed over a texel."""
        return np.clip(0.5 - sdf_mm / self.px, 0.0, 1.0)

    def paint(self, coverage: np.ndarray, colour: np.ndarray, opacity: float = 1.0) -> None:
        a = (np.broadcast_to(coverage, self.rgb.shape[:2]) * opacity)[..., None]
        self.rgb[...] = self.rgb * (1 - a) + a * colour


def _wobble(theta: np.ndarray, seed: int, amp_mm: float) -> np.ndarray:
    """A hand-painted edge's offset (mm): periodic in theta, a few waves."""
    rng = np.random.default_rng([DemoConfig.seed, seed])
    out = np.zeros_like(theta)
    for k in (3, 5, 8, 13):
        out += rng.normal() / math.sqrt(k) * np.sin(k * theta + rng.uniform(0, 2 * np.pi))
    return out * amp_mm


def _ellipse_sdf(x: np.ndarray, y: np.ndarray, a: float, b: float) -> np.ndarray:
    """Approximate signed distance (first order) to an axis-aligned ellipse with semi-axes a, b."""
    k = np.sqrt((x / a) ** 2 + (y / b) ** 2) + 1e-9
    grad = np.sqrt((x / (a * a)) ** 2 + (y / (b * b)) ** 2) / k + 1e-9
    return (k - 1) / grad


def _segment_sdf(x, y, x0, y0, x1, y1, half_width):
    dx, dy = x1 - x0, y1 - y0
    t = np.clip(((x - x0) * dx + (y - y0) * dy) / (dx * dx + dy * dy), 0, 1)
    return np.hypot(x - x0 - t * dx, y - y0 - t * dy) - half_width


def _rot(x, y, ang):
    c, s = math.cos(ang), math.sin(ang)
    return c * x + s * y, -s * x + c * y


def _band(cv: _Canvas, z0: float, z1: float, seed: int, colour: str) -> None:
    """A painted ring between heights z0 and z1 (mm) with wobbly brushed edges."""
    keep = cv.band_rows(z0 - 2, z1 + 2)
    sub = cv.rows(keep)
    lo = z0 + _wobble(sub.theta, seed, 0.35)
    hi = z1 + _wobble(sub.theta, seed + 1, 0.35)
    sub.paint(sub.cover(np.maximum(lo - sub.z, sub.z - hi)), _lin(colour))
    cv.put(keep, sub)


def _paint_flowers(cv: _Canvas) -> None:
    """Six flowers around the belly (z = 62 mm) with leaves and stems, ochre dots between them."""
    zc = 62.0
    keep = cv.band_rows(zc - 30, zc + 30)
    sub = cv.rows(keep)
    y = np.broadcast_to(sub.z - zc, sub.rgb.shape[:2])
    for k in range(6):
        tk = math.radians(30 + 60 * k)
        x = sub.around(tk)
        cols = np.flatnonzero(np.abs(x).min(axis=0) < 30)      # columns this flower touches
        f = _Canvas(sub.rgb[:, cols], sub.px, sub.theta[:, cols], sub.z, sub.r, sub.part)
        xm, ym = x[:, cols], y[:, cols]
        f.paint(f.cover(_segment_sdf(xm, ym, 0.0, -4.0, 1.5, -24.0, 0.35)), _lin("manganese"))
        for side in (-1, 1):
            lx, ly = _rot(xm - side * 8.5, ym + 16.0, side * math.radians(35))
            f.paint(f.cover(_ellipse_sdf(lx, ly, 6.0, 2.0)), _lin("green"))
            f.paint(f.cover(np.abs(ly) - 0.18) * (np.abs(lx) < 5.0), _lin("cobalt_dark"), 0.6)
        for p in range(6):
            px, py = _rot(xm, ym, math.radians(90 + 60 * p + 7 * k))
            f.paint(f.cover(_ellipse_sdf(px - 7.0, py, 5.0, 2.3)), _lin("cobalt"))
            f.paint(f.cover(np.abs(py) - 0.18) * (np.abs(px - 7.0) < 3.8), _lin("cobalt_dark"))
        f.paint(f.cover(np.hypot(xm, ym) - 3.0), _lin("ochre"))
        for p in range(5):
            ang = 2 * math.pi * p / 5 + 0.3 * k
            f.paint(f.cover(np.hypot(xm - 1.6 * math.cos(ang), ym - 1.6 * math.sin(ang)) - 0.45), _lin("manganese"))
        sub.rgb[:, cols] = f.rgb
        xd = sub.around(tk + math.radians(30))                  # dots between this flower and the next
        for zd in (50.0, 62.0, 74.0):
            sub.paint(sub.cover(np.hypot(xd, sub.z - zd) - 1.2), _lin("ochre"))
    cv.put(keep, sub)


def _paint_raised_band(cv: _Canvas) -> None:
    """The raised band: cobalt ground, a cream zigzag and cream dots."""
    lo, hi = BAND_Z[0] * 1000 + 0.4, BAND_Z[1] * 1000 - 0.4
    keep = cv.band_rows(lo - 2, hi + 2)
    sub = cv.rows(keep)
    sub.paint(sub.cover(np.maximum(lo - sub.z, sub.z - hi)), _lin("cobalt"))
    # a whole number of teeth around, on a fixed radius so the teeth stay upright and meet at the seam
    r_ref = float(PchipInterpolator(WALL_Z, WALL_R)(np.mean(BAND_Z))) * 1000
    period = 2 * math.pi * r_ref / round(2 * math.pi * r_ref / 9.0)
    X = sub.theta * r_ref
    zig = 125.0 + 4.0 * (4 * np.abs((X / period) % 1.0 - 0.5) - 1)
    slope = 8.0 * 4 / period
    inside = (sub.z > lo) & (sub.z < hi)
    sub.paint(inside * sub.cover(np.abs(sub.z - zig) / math.sqrt(1 + slope ** 2) - 0.5), _lin("glaze"))
    xd = (((X / period) + 0.5) % 1.0 - 0.5) * period
    sub.paint(sub.cover(np.hypot(xd, sub.z - 121.5) - 0.7), _lin("glaze"))
    cv.put(keep, sub)


def _paint_lettering(cv: _Canvas, z_base: float, glyph_mm: float, stroke_mm: float, seed: int) -> None:
    """One line of fine glyph-like strokes around the jug, glyphs from z_base up (mm)."""
    wall = PchipInterpolator(WALL_Z, WALL_R)
    circ = 2 * math.pi * float(wall((z_base + glyph_mm / 2) / 1000)) * 1000   # mm
    res = 10.0                                                                 # strip pixels per mm
    h = int(math.ceil(glyph_mm * 1.35 * res))
    cov = fine_print_coverage(int(circ * res), h, glyph_px=glyph_mm * res, stroke_px=stroke_mm * res,
                              line_spacing=10.0, seed=seed, supersample=2)
    top = z_base + glyph_mm * 1.3                    # strip row 0 (glyphs start 0.3 glyph below it)
    keep = cv.band_rows(top - h / res, top)
    if not keep.any():
        return
    sub = cv.rows(keep)
    col, row = np.broadcast_arrays(((sub.theta - np.pi) % (2 * np.pi)) / (2 * np.pi) * cov.shape[1],
                                   (top - sub.z) * res)
    ink = map_coordinates(cov, [row, col], order=1, mode="grid-wrap")
    sub.paint(np.clip(ink, 0, 1), _lin("manganese"), 0.95)
    cv.put(keep, sub)


def _paint_neck(cv: _Canvas) -> None:
    """A green wave with cobalt dots in its troughs."""
    keep = cv.band_rows(170.0, 186.0)
    sub = cv.rows(keep)
    wave = 178.0 + 3.0 * np.sin(10 * sub.theta)
    sub.paint(sub.cover(np.abs(sub.z - wave) - 0.45), _lin("green"))
    for k in range(20):
        tk = (k + 0.5) * math.pi / 10
        zk = 178.0 - 4.6 * math.sin(10 * tk)
        sub.paint(sub.cover(np.hypot(sub.around(tk), sub.z - zk) - 0.9), _lin("cobalt"))
    cv.put(keep, sub)


def _paint_body(cv: _Canvas) -> None:
    """All the decoration, bottom to top; the foot and underside unglazed, the rim brown."""
    _band(cv, 12.0, 15.0, 1, "manganese")
    _band(cv, 19.0, 26.0, 3, "cobalt")
    _paint_flowers(cv)
    _band(cv, 104.0, 107.0, 5, "ochre")
    _paint_raised_band(cv)
    _band(cv, 135.0, 136.0, 7, "manganese")
    _paint_lettering(cv, 139.5, 3.0, 0.35, seed=21)
    _paint_lettering(cv, 145.0, 5.0, 0.5, seed=22)
    _band(cv, 163.0, 164.2, 9, "cobalt")
    _paint_neck(cv)
    part, z = cv.part, cv.z
    rim = ((part == LIP) | ((part == OUTER) & (z > 208.0 + _wobble(cv.theta, 11, 0.5)))
           | ((part == INNER) & (z > 209.0 + _wobble(cv.theta, 12, 0.5))))
    cv.paint(rim.astype(np.float32), _lin("manganese"))
    unglazed = (part == BOTTOM) | (part == FOOT_PART) | ((part == OUTER) & (z < 9.8 + _wobble(cv.theta, 13, 0.8)))
    cv.paint(unglazed.astype(np.float32), _lin("clay"))


def _speckle(rgb: np.ndarray, centres: np.ndarray, radii: np.ndarray, rng: np.random.Generator) -> None:
    """Stamp iron specks into rgb (H, W, 3): centres (N, 2) texel (row, col), radii (N, 2) texels."""
    H, W = rgb.shape[:2]
    col = _lin("speck")
    for (r0, c0), (rr, rc), op in zip(centres, radii, rng.uniform(0.5, 0.9, len(centres))):
        i0, i1 = int(max(0, r0 - rr - 2)), int(min(H, r0 + rr + 3))
        j0, j1 = int(max(0, c0 - rc - 2)), int(min(W, c0 + rc + 3))
        if i0 >= i1 or j0 >= j1:
            continue
        ii, jj = np.mgrid[i0:i1, j0:j1]
        k = np.sqrt(((ii + 0.5 - r0) / rr) ** 2 + ((jj + 0.5 - c0) / rc) ** 2)
        a = op * np.clip((1 - k) * min(rr, rc) + 0.5, 0, 1)[..., None]
        blk = rgb[i0:i1, j0:j1]
        blk[...] = blk * (1 - a) + a * col


def _body_canvas(T: int, rows: np.ndarray, vrow: np.ndarray) -> tuple[_Canvas, np.ndarray]:
    """Canvas over texture rows `rows` of the body; also mm per texel row (R,)."""
    p, parts = dense_profile()
    m = uv_measure(p, parts)
    mv = np.clip((vrow[rows] - V_BODY) / (1 - V_BODY), 0, 1) * m[-1]
    part = parts[np.clip(np.searchsorted(m, mv), 0, len(p) - 1)]
    r = np.interp(mv, m, p[:, 0]) * 1000
    z = np.interp(mv, m, p[:, 1]) * 1000
    mm_row = m[-1] / (1 - V_BODY) / T * 1000 / np.where(np.isin(part, (INNER, FLOOR)), INNER_UV_WEIGHT, 1.0)
    theta = (body_theta((np.arange(T) + 0.5) / T) % (2 * np.pi))[None, :]
    px = np.maximum(mm_row[:, None], 2 * np.pi * np.maximum(r, 1.0)[:, None] / T)
    base = _lin("glaze") * (1 + 0.025 * (_wobble(theta, 31, 1.0) * np.sin(z[:, None] / 37.0)))[..., None]
    inside = np.isin(part, (INNER, FLOOR))[:, None, None]
    rgb = np.where(inside, base * 0.93, base).astype(np.float32)
    return _Canvas(rgb, px, theta, z[:, None], r[:, None], part[:, None]), mm_row


def _handle_strip(T: int, vrow: np.ndarray) -> np.ndarray:
    """(R, T, 3) linear RGB of the handle strip rows: cream, a cobalt stripe on the outer side with
    brown dashes beside it."""
    phi = (vrow - V_HANDLE0) / (V_HANDLE1 - V_HANDLE0) * 2 * np.pi
    length_mm = float(np.sum(np.linalg.norm(np.diff(handle_frame(400)[0], axis=0), axis=1))) * 1000
    a, b = HANDLE_HALF
    half_perimeter = math.pi * (a + b) / 2 * 1000          # mm (approx.)
    Y = ((phi - np.pi) / np.pi * half_perimeter)[:, None]  # arc from the outer side, mm
    L = ((np.arange(T) + 0.5) / T * length_mm)[None, :]
    px = np.full((len(vrow), T), max(length_mm / T, 2 * half_perimeter / ((V_HANDLE1 - V_HANDLE0) * T)))
    cv = _Canvas(np.broadcast_to(_lin("glaze"), px.shape + (3,)).astype(np.float32).copy(), px,
                 np.zeros((1, T)), Y, np.ones_like(Y), np.full_like(Y, -1))
    cv.paint(cv.cover(np.abs(Y) - 2.5), _lin("cobalt"))
    dash = (((L / 8.0) % 1.0) - 0.5) * 8.0
    for side in (-1, 1):
        cv.paint(cv.cover(np.maximum(np.abs(dash) - 1.6, np.abs(Y - side * 4.5) - 0.5)), _lin("manganese"))
    return cv.rgb


def paint_albedo(size: int, seed: int) -> np.ndarray:
    """The jug's painted albedo in the true mesh's uv layout: (size, size, 3) uint8, sRGB-encoded."""
    rng = np.random.default_rng([seed, 5])
    T = size
    vrow = 1.0 - (np.arange(T) + 0.5) / T                 # v of each texel row (v up)
    img = np.empty((T, T, 3), np.float32)
    body = vrow >= V_BODY - 4.0 / T                       # a few rows below it continue the pattern (padding)
    cv, mm_row = _body_canvas(T, np.flatnonzero(body), vrow)
    _paint_body(cv)
    # iron specks in the glaze of the outer wall: ~1.2 per cm^2
    outer_rows = np.flatnonzero(cv.part[:, 0] == OUTER)
    r_row = cv.r[:, 0]
    n = int(float(np.sum(2 * np.pi * r_row[outer_rows] * mm_row[outer_rows])) / 100 * 1.2)
    rows = rng.choice(outer_rows, n, p=r_row[outer_rows] / r_row[outer_rows].sum()) + rng.uniform(0, 1, n)
    rad_mm = rng.uniform(0.12, 0.35, n)
    ri = np.clip(rows.astype(int), 0, len(r_row) - 1)
    radii = np.stack([rad_mm / mm_row[ri], rad_mm / (2 * np.pi * r_row[ri] / T)], 1)
    _speckle(cv.rgb, np.stack([rows, rng.uniform(0, T, n)], 1), np.maximum(radii, 0.5), rng)
    img[body] = cv.rgb
    img[~body] = _handle_strip(T, vrow[~body])
    return to_uint8(linear_to_srgb(img))
