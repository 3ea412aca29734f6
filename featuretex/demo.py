"""The bundled demo: a glazed, hand-painted ceramic jug photographed on a turntable for a shop catalogue.

Everything is invented and procedural. Ground truth: a jug 22 cm tall (unit: meter, +z up, base
at z = 0, spout towards +x, handle towards -x) made of a surface of revolution (foot, belly, a
raised decorative band, neck, rolled rim, inner wall) plus a swept handle, painted with a
procedural texture (bands, flowers, a zigzag on the raised band, two lines of fine lettering-like
strokes, iron speckles in the glaze), rendered with pyrender under soft fixed lighting.

The scan to fix is a coarser re-sampling of the same surface (fewer profile samples and azimuth
steps at other positions; the handle likewise), with: low-frequency noise along the normals
(0.5 mm RMS), one dent (4 mm deep at its centre, 2 cm radius), the raised band smoothed flat over a
90 degree sector, one hole about 1 cm across, and its own xatlas UV layout. The manifest's poses
are wrong by 0.15 degree and 0.5 mm per view.

`python -m featuretex.demo [--out DIR] [--small]` writes DIR/scene/ (the scene folder) and
DIR/ground_truth/ (true mesh, albedo, per-face error of the scan, defects, true poses).
"""

from __future__ import annotations

import argparse
import math
import os
import shutil
import sys
import tempfile
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import trimesh
from PIL import Image
from scipy.interpolate import PchipInterpolator, make_interp_spline
from scipy.ndimage import map_coordinates

from featuretex.atomic import atomic_path, write_json
from featuretex.scene.camera import Camera
from featuretex.scene.colour import linear_to_srgb, srgb_to_linear, to_uint8
from featuretex.scene.mesh import load_mesh, make_atlas, smooth_normals
from featuretex.userdirs import user_cache_dir
from featuretex.synth import (dent, fine_print_coverage, orbit_poses, render_views,
                              textured_mesh, write_scene)

DEMO_VERSION = "jug-1"   # bump when the generated content changes (names the cache folder)

# --- jug dimensions (meters) -------------------------------------------------------------------
HEIGHT = 0.220
RIM_Z = 0.217            # centre height of the rolled rim; its top is RIM_Z + LIP_R
LIP_R = 0.003
WALL = 0.006             # wall thickness
INNER_FLOOR_Z = 0.014
# outer wall control points (z, r), shape-preserving (PCHIP) between them
WALL_Z = np.array([0.0095, 0.020, 0.040, 0.065, 0.085, 0.105, 0.130, 0.155, 0.175, 0.190, 0.205, RIM_Z])
WALL_R = np.array([0.0430, 0.0505, 0.0585, 0.0620, 0.0615, 0.0575, 0.0490, 0.0400, 0.0360, 0.0358, 0.0385, 0.0420])
BAND_Z = (0.118, 0.132)  # raised decorative band
BAND_H = 0.0025          # how far it stands proud
BAND_RAMP = 0.0012       # width of its edges
SPOUT = dict(amp=0.010, sigma=0.35, z0=0.190)
# foot and underside polyline (r, z), from the axis outwards, ending where the wall starts
FOOT = [(0.0, 0.0025), (0.034, 0.0025), (0.036, 0.0), (0.041, 0.0), (0.0425, 0.0015), (0.0425, 0.005),
        (0.0405, 0.0075), (WALL_R[0], WALL_Z[0])]
# handle centre line in the x-z plane (y = 0); both ends run radially 3 mm into the 6 mm wall, so the
# closed ends stay buried between its outer and inner surfaces
HANDLE_PTS = np.array([(-0.033, 0.190), (-0.048, 0.193), (-0.070, 0.190), (-0.089, 0.174), (-0.098, 0.148),
                       (-0.096, 0.116), (-0.087, 0.088), (-0.074, 0.066), (-0.058, 0.059)])
HANDLE_HALF = (0.007, 0.0045)   # half width (along y), half thickness (in the x-z plane)

# parts of the profile, for painting and for the defects
BOTTOM, FOOT_PART, OUTER, LIP, INNER, FLOOR = range(6)

# --- defects of the scan ------------------------------------------------------------------------
DENT = dict(theta_deg=-50.0, z=0.075, radius=0.020, depth=0.004)
SMOOTHED = dict(theta_from_deg=40.0, theta_to_deg=130.0, ramp_deg=8.0)
HOLE = dict(theta_deg=100.0, z=0.040, radius=0.005)
NOISE_RMS = 0.0005
NOISE_WAVELENGTHS = (0.06, 0.15)

# body texture layout: v in [V_BODY, 1] (profile), handle in [V_HANDLE0, V_HANDLE1] (around the tube)
V_BODY, V_HANDLE0, V_HANDLE1 = 0.20, 0.005, 0.175
INNER_UV_WEIGHT = 0.35   # texel density of the hardly-seen inside relative to the outside


@dataclass(frozen=True)
class DemoConfig:
    """Sizes of everything generated; `small()` gives a fast variant for tests."""

    n_views: int = 30
    width: int = 640
    height: int = 480
    focal: float = 900.0
    distance: float = 0.56
    elevations_deg: tuple[float, ...] = (8.0, 28.0, 50.0)
    texture: int = 2048
    true_theta: int = 180        # azimuth steps of the true body
    true_step: float = 0.0015    # max profile step outside (inside: / INNER_UV_WEIGHT)
    true_turn_deg: float = 8.0   # max turn of the profile per step
    handle_true: tuple[int, int] = (160, 36)
    scan_theta: int = 96
    scan_step: float = 0.0035
    scan_turn_deg: float = 25.0
    handle_scan: tuple[int, int] = (56, 16)
    atlas: int = 1024
    holdout_every: int = 5       # views k with k % holdout_every == 2 are held out
    exposure_jitter: float = 0.07
    white_balance_jitter: float = 0.025
    noise_sigma: float = 0.006
    pose_noise_deg: float = 0.15
    pose_noise_m: float = 0.0005
    light_seed: int = 3
    roughness: float = 0.32     # glaze: a mild sheen
    background: tuple[float, float, float] = (0.33, 0.33, 0.34)
    seed: int = 7

    @staticmethod
    def small() -> "DemoConfig":
        return DemoConfig(n_views=5, width=160, height=120, focal=225.0, texture=512, true_theta=64,
                          true_step=0.004, handle_true=(48, 12), scan_theta=40, scan_step=0.008,
                          handle_scan=(24, 8), atlas=256)


# =============================================================================================
# Geometry
# =============================================================================================
def _smoothstep(x: np.ndarray) -> np.ndarray:
    x = np.clip(x, 0.0, 1.0)
    return x * x * (3 - 2 * x)


def band_bump(z: np.ndarray) -> np.ndarray:
    """Radial height of the raised band at height z (meters), 0 outside it."""
    a, b = BAND_Z
    return BAND_H * _smoothstep((z - a) / BAND_RAMP) * _smoothstep((b - z) / BAND_RAMP)


def _offset_inwards(r: np.ndarray, z: np.ndarray, d: float) -> tuple[np.ndarray, np.ndarray]:
    """Offset a polyline going up the outer wall by d towards the inside (to the left of travel)."""
    tr, tz = np.gradient(r), np.gradient(z)
    n = np.hypot(tr, tz)
    return r - d * tz / n, z + d * tr / n


def dense_profile() -> tuple[np.ndarray, np.ndarray]:
    """The jug's profile as a dense polyline: points (N, 2) = (r, z) meters, part label (N,) int.

    Runs from the axis under the base, out over the foot, up the outer wall, over the rim, down the
    inner wall and across the inner floor back to the axis (so revolving it gives outward normals).
    """
    pts, parts = [], []

    def add(r, z, part):
        pts.append(np.stack([r, z], 1))
        parts.append(np.full(len(r), part))

    foot = np.array(FOOT)
    for k in range(len(foot) - 1):
        t = np.linspace(0, 1, max(3, int(np.hypot(*(foot[k + 1] - foot[k])) / 2e-4)), endpoint=False)
        seg = foot[k] + t[:, None] * (foot[k + 1] - foot[k])
        add(seg[:, 0], seg[:, 1], BOTTOM if k < 1 else FOOT_PART)
    wall = PchipInterpolator(WALL_Z, WALL_R)
    z = np.linspace(WALL_Z[0], RIM_Z, 2400)
    r_plain = wall(z)
    add(r_plain + band_bump(z), z, OUTER)
    ang = np.linspace(0, np.pi, 60)[1:-1]                 # rolled rim: half circle over the top
    add(WALL_R[-1] - LIP_R + LIP_R * np.cos(ang), RIM_Z + LIP_R * np.sin(ang), LIP)
    keep = z >= 0.030
    ri, zi = _offset_inwards(r_plain[keep], z[keep], WALL)
    add(ri[::-1], zi[::-1], INNER)
    r0, z0 = ri[0], zi[0]                                 # fillet down to the floor, then to the axis
    t = np.linspace(0, 1, 40)[1:]
    c = np.array([r0 - 0.002, INNER_FLOOR_Z])
    e = np.array([r0 - 0.012, INNER_FLOOR_Z])
    bez = ((1 - t) ** 2)[:, None] * np.array([r0, z0]) + (2 * t * (1 - t))[:, None] * c + (t ** 2)[:, None] * e
    add(bez[:, 0], bez[:, 1], FLOOR)
    rr = np.linspace(e[0], 0.0, 200)[1:]
    add(rr, np.full(len(rr), INNER_FLOOR_Z), FLOOR)
    return np.concatenate(pts), np.concatenate(parts)


def arc_length(p: np.ndarray) -> np.ndarray:
    """(N,) cumulative arc length of a polyline (N, 2)."""
    return np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(p, axis=0), axis=1))])


def uv_measure(p: np.ndarray, parts: np.ndarray) -> np.ndarray:
    """(N,) cumulative length with the inside weighted by INNER_UV_WEIGHT (the body's v layout)."""
    seg = np.linalg.norm(np.diff(p, axis=0), axis=1)
    inside = np.isin(parts[1:], (INNER, FLOOR))
    return np.concatenate([[0.0], np.cumsum(seg * np.where(inside, INNER_UV_WEIGHT, 1.0))])


def resample_profile(p: np.ndarray, parts: np.ndarray, step: float, turn_deg: float) -> np.ndarray:
    """Indices into the dense profile: at most `step` apart outside (step / INNER_UV_WEIGHT inside)
    and at most `turn_deg` of turning apart, so corners get samples and smooth spans few."""
    seg = np.linalg.norm(np.diff(p, axis=0), axis=1)
    inside = np.isin(parts[1:], (INNER, FLOOR))
    d = np.diff(p, axis=0)
    heading = np.unwrap(np.arctan2(d[:, 1], d[:, 0]))
    turn = np.abs(np.diff(heading, prepend=heading[0]))
    m = np.concatenate([[0.0], np.cumsum(seg / np.where(inside, step / INNER_UV_WEIGHT, step)
                                         + turn / math.radians(turn_deg))])
    n = int(math.ceil(m[-1])) + 1
    idx = np.unique(np.clip(np.searchsorted(m, np.linspace(0, m[-1], n)), 0, len(p) - 1))
    # no two samples closer than 0.4 step along the profile: slivers at corners would fold when
    # the scan's noise moves their vertices along very different normals
    s = arc_length(p)
    keep = [0]
    for i in idx[1:-1]:
        if s[i] - s[keep[-1]] >= 0.4 * step:
            keep.append(int(i))
    if s[-1] - s[keep[-1]] < 0.4 * step and len(keep) > 1:
        keep.pop()
    return np.array(keep + [len(p) - 1])


def spout_offset(theta: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Radial pull of the pouring lip (meters), theta measured from +x."""
    wrapped = (theta + np.pi) % (2 * np.pi) - np.pi
    ramp = np.clip((z - SPOUT["z0"]) / (HEIGHT - SPOUT["z0"]), 0.0, 1.0) ** 2
    return SPOUT["amp"] * np.exp(-(wrapped / SPOUT["sigma"]) ** 2) * ramp


def _grid_faces(rows: int, cols: int) -> np.ndarray:
    """Triangles of a (rows, cols) grid, row = profile sample, col = azimuth: outward for our profile."""
    i, j = np.meshgrid(np.arange(rows - 1), np.arange(cols - 1), indexing="ij")
    a = (i * cols + j).ravel()
    b, c, d = a + 1, a + cols, a + cols + 1
    return np.concatenate([np.stack([a, b, c], 1), np.stack([b, d, c], 1)]).astype(np.int64)


def _drop_degenerate(v: np.ndarray, f: np.ndarray) -> np.ndarray:
    area2 = np.linalg.norm(np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]]), axis=1)
    return f[area2 > 1e-14]


def body_theta(u: np.ndarray) -> np.ndarray:
    """Azimuth (from +x) of texture column u: the uv seam lies at theta = pi, under the handle."""
    return np.pi + 2 * np.pi * np.asarray(u)


def revolve(rz: np.ndarray, v_prof: np.ndarray, n_theta: int, phase: float = 0.0,
            radial: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Revolve profile samples (S, 2) = (r, z) into a grid with a duplicated seam column.

    v_prof: (S,) texture v of each sample; `phase` shifts azimuths (fraction of a step);
    `radial(theta (S, C), z (S, C)) -> (S, C)` optional extra radius. Returns vertices (S*C, 3),
    faces (F, 3) without degenerate ones, uv (S*C, 2) v up.
    """
    u = (np.arange(n_theta + 1) + phase) / n_theta
    u[-1] = u[0] + 1.0 if phase else 1.0
    theta = body_theta(u)
    r = np.repeat(rz[:, :1], n_theta + 1, axis=1)
    z = np.repeat(rz[:, 1:], n_theta + 1, axis=1)
    th = np.broadcast_to(theta, r.shape)
    r = r + spout_offset(th, z) * (r > 0)
    if radial is not None:
        r = r + radial(th, z)
    verts = np.stack([r * np.cos(th), r * np.sin(th), z], -1)
    verts[:, -1] = verts[:, 0]                            # the seam column coincides exactly
    verts = verts.reshape(-1, 3)
    uv = np.stack([np.broadcast_to(u - u[0], r.shape), np.broadcast_to(v_prof[:, None], r.shape)], -1)
    faces = _drop_degenerate(verts, _grid_faces(len(rz), n_theta + 1))
    return verts, faces, uv.reshape(-1, 2)


def handle_frame(n_along: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Centre line of the handle: points (n, 3), unit tangents, in-plane normals (n, 3), t (n,) in [0, 1]."""
    chord = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(HANDLE_PTS, axis=0), axis=1))])
    ends = ([(1, np.array([-chord[-1], 0.0]))], [(1, np.array([chord[-1], 0.0]))])   # radial at both ends
    spline = make_interp_spline(chord / chord[-1], HANDLE_PTS, k=3, bc_type=ends)
    t = np.linspace(0.0, 1.0, n_along)
    xz = spline(t)
    dxz = spline.derivative()(t)
    tang = np.stack([dxz[:, 0], np.zeros(n_along), dxz[:, 1]], 1)
    tang /= np.linalg.norm(tang, axis=1, keepdims=True)
    normal = np.stack([tang[:, 2], np.zeros(n_along), -tang[:, 0]], 1)   # y x tangent: away from the body
    return np.stack([xz[:, 0], np.zeros(n_along), xz[:, 1]], 1), tang, normal, t


def handle_mesh(n_along: int, n_around: int, phase: float = 0.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Swept elliptic tube with closed ends. uv: u along the handle, v around it in the handle strip.

    The cross-section angle phi starts on the side facing the body (so the uv seam hides there);
    phi = pi is the outer side. The ends flare by 25 % where they join the wall.
    """
    centre, _, normal, t = handle_frame(n_along)
    phi = 2 * np.pi * (np.arange(n_around + 1) + phase) / n_around
    flare = 1 + 0.25 * (np.exp(-(t / 0.08) ** 2) + np.exp(-((1 - t) / 0.08) ** 2))
    a, b = HANDLE_HALF
    yax = np.array([0.0, 1.0, 0.0])
    ring = (centre[:, None, :] - (b * flare)[:, None, None] * np.cos(phi)[None, :, None] * normal[:, None, :]
            - (a * flare)[:, None, None] * np.sin(phi)[None, :, None] * yax)
    ring[:, -1] = ring[:, 0]                              # the seam coincides exactly
    verts = ring.reshape(-1, 3)
    v_of_phi = V_HANDLE0 + (V_HANDLE1 - V_HANDLE0) * (phi - phi[0]) / (2 * np.pi)
    uv = np.stack(np.broadcast_arrays(t[:, None], v_of_phi[None, :]), -1).reshape(-1, 2)
    faces = _grid_faces(n_along, n_around + 1)
    # end caps: a fan around each end's centre point
    cols = n_around + 1
    caps, extra_v, extra_uv = [], [], []
    for row, flip in ((0, True), (n_along - 1, False)):
        c_idx = len(verts) + len(extra_v)
        extra_v.append(centre[row])
        extra_uv.append([t[row], 0.5 * (V_HANDLE0 + V_HANDLE1)])
        j = np.arange(n_around)
        fan = np.stack([np.full(n_around, c_idx), row * cols + j, row * cols + j + 1], 1)
        caps.append(fan[:, ::-1] if flip else fan)
    verts = np.concatenate([verts, np.array(extra_v)])
    uv = np.concatenate([uv, np.array(extra_uv)])
    faces = np.concatenate([faces] + caps)
    if trimesh.Trimesh(verts, faces, process=False).volume < 0:   # make the normals point outwards
        faces = faces[:, ::-1]
    return verts, _drop_degenerate(verts, faces), uv


def body_samples(step: float, turn_deg: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Resampled profile: rz (S, 2), part (S,), texture v (S,)."""
    p, parts = dense_profile()
    idx = resample_profile(p, parts, step, turn_deg)
    m = uv_measure(p, parts)
    v = V_BODY + (1 - V_BODY) * m / m[-1]
    return p[idx], parts[idx], v[idx]


def true_jug(cfg: DemoConfig, albedo: Image.Image | None) -> trimesh.Trimesh:
    """The ground-truth jug: body + handle, one textured mesh (two closed shells, the handle's ends
    buried in the wall)."""
    rz, _, v = body_samples(cfg.true_step, cfg.true_turn_deg)
    bv, bf, buv = revolve(rz, v, cfg.true_theta)
    hv, hf, huv = handle_mesh(*cfg.handle_true)
    verts = np.concatenate([bv, hv])
    faces = np.concatenate([bf, hf + len(bv)])
    return textured_mesh(verts, faces, np.concatenate([buv, huv]), albedo)


# =============================================================================================
# The scan and its defects
# =============================================================================================
def _sector_weight(theta: np.ndarray) -> np.ndarray:
    """1 inside the smoothed sector, 0 outside, cosine ramps of SMOOTHED['ramp_deg']."""
    deg = np.degrees((theta + np.pi) % (2 * np.pi) - np.pi)
    a, b, w = SMOOTHED["theta_from_deg"], SMOOTHED["theta_to_deg"], SMOOTHED["ramp_deg"]
    return _smoothstep((deg - a + w) / w) * _smoothstep((b + w - deg) / w)


def _merge_seam(v: np.ndarray, f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weld vertices at the same position (seam column, pole rows); face order is kept."""
    _, first, inv = np.unique(np.round(v, 10), axis=0, return_index=True, return_inverse=True)
    order = np.argsort(first)                  # keep the first-seen order of vertices
    rank = np.empty_like(order)
    rank[order] = np.arange(len(order))
    return v[first[order]], rank[inv.ravel()][f]


def _low_frequency_noise(p: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """(N,) smooth random field (meters) at points (N, 3): a few plane waves, RMS NOISE_RMS over p."""
    field = np.zeros(len(p))
    for _ in range(6):
        k = rng.normal(size=3)
        k *= 2 * np.pi / (np.linalg.norm(k) * rng.uniform(*NOISE_WAVELENGTHS))
        field += rng.normal() * np.sin(p @ k + rng.uniform(0, 2 * np.pi))
    return field * NOISE_RMS / np.sqrt(np.mean(field ** 2))


def _surface_point(theta_deg: float, z: float) -> tuple[np.ndarray, np.ndarray]:
    """Point and outward normal of the true outer wall at azimuth theta (deg, from +x) and height z."""
    wall = PchipInterpolator(WALL_Z, WALL_R)
    th = math.radians(theta_deg)
    r = float(wall(z) + band_bump(np.array(z)) + spout_offset(np.array(th), np.array(z)))
    drdz = float(wall.derivative()(z))
    radial = np.array([math.cos(th), math.sin(th), 0.0])
    n = radial - drdz * np.array([0.0, 0.0, 1.0])
    return r * radial + np.array([0.0, 0.0, z]), n / np.linalg.norm(n)


def scan_jug(cfg: DemoConfig) -> tuple[trimesh.Trimesh, dict]:
    """The scan to fix (no uv yet) and a description of its defects (positions in meters)."""
    rng = np.random.default_rng([cfg.seed, 11])
    rz, parts, v = body_samples(cfg.scan_step, cfg.scan_turn_deg)
    outer = parts == OUTER

    def smoothing(theta, z):               # the band, flattened over the sector, on the outer wall only
        return -band_bump(z) * _sector_weight(theta) * outer[:, None]

    bv, bf, _ = revolve(rz, v, cfg.scan_theta, phase=0.5, radial=smoothing)
    bv, bf = _merge_seam(bv, bf)
    hv, hf, _ = handle_mesh(*cfg.handle_scan, phase=0.5)
    hv, hf = _merge_seam(hv, hf)
    verts = np.concatenate([bv, hv])
    faces = np.concatenate([bf, hf + len(bv)])
    normals = smooth_normals(verts, faces)
    noise = _low_frequency_noise(verts, rng)
    verts = verts + noise[:, None] * normals
    mesh = trimesh.Trimesh(verts, faces, process=False)

    # dent: centred on the scan vertex nearest the wanted spot; sunk so that the scan lies exactly
    # DENT['depth'] below the true surface there (the noise already moved that vertex by noise[c])
    want, want_n = _surface_point(DENT["theta_deg"], DENT["z"])
    body_outer = np.flatnonzero((np.arange(len(verts)) < len(bv)) & (normals @ want_n > 0.5))
    c = int(body_outer[np.argmin(np.linalg.norm(verts[body_outer] - want, axis=1))])
    centre_true = verts[c] - noise[c] * normals[c]
    mesh = dent(mesh, verts[c], DENT["radius"], DENT["depth"] + noise[c], normal=normals[c])

    # hole: drop the outward-facing faces within HOLE['radius'] of the spot
    hole_c, hole_n = _surface_point(HOLE["theta_deg"], HOLE["z"])
    tri = mesh.vertices[mesh.faces]
    cen = tri.mean(axis=1)
    fn = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    fn /= np.linalg.norm(fn, axis=1, keepdims=True)
    gone = (np.linalg.norm(cen - hole_c, axis=1) < HOLE["radius"]) & (fn @ hole_n > 0.5)
    used = np.unique(mesh.faces[~gone])
    remap = np.full(len(mesh.vertices), -1)
    remap[used] = np.arange(len(used))
    scan = trimesh.Trimesh(mesh.vertices[used], remap[mesh.faces[~gone]], process=False)
    info = {
        "dent": {"centre": centre_true, "normal": normals[c], "radius": DENT["radius"], "depth": DENT["depth"]},
        "hole": {"centre": hole_c, "normal": hole_n, "radius": HOLE["radius"], "faces_removed": int(gone.sum())},
        "smoothed": {"theta_deg": (SMOOTHED["theta_from_deg"], SMOOTHED["theta_to_deg"]), "z": BAND_Z,
                     "depth": BAND_H},
    }
    return scan, info


def _face_frames(v: np.ndarray, f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Centroids (F, 3) and unit outward normals (F, 3) of triangles."""
    tri = v[f]
    n = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    return tri.mean(axis=1), n / np.linalg.norm(n, axis=1, keepdims=True)


def closest_distance(points: np.ndarray, normals: np.ndarray, true_mesh: trimesh.Trimesh,
                     upper: np.ndarray) -> np.ndarray:
    """(N,) meters from each point to the nearest true triangle facing like its normal (n . n_true >
    0.3, so the far side of a thin wall does not count), searched up to `upper` (N,); inf beyond.

    Exact point-triangle distances (trimesh.triangles.closest_point). A triangle can only be nearer
    than `upper` if its centre is within upper + its circumradius, so triangles are searched in
    tiers of circumradius to keep the candidate lists short.
    """
    from scipy.spatial import cKDTree

    tris, fn, centres = true_mesh.triangles, true_mesh.face_normals, true_mesh.triangles_center
    circ = np.linalg.norm(tris - centres[:, None], axis=2).max(axis=1)
    out = np.full(len(points), np.inf)
    for lo, hi in ((0.0, 0.0015), (0.0015, 0.003), (0.003, np.inf)):
        tier = np.flatnonzero((circ > lo) & (circ <= hi))
        if len(tier) == 0:
            continue
        lists = cKDTree(centres[tier]).query_ball_point(points, r=upper + circ[tier].max())
        owner = np.repeat(np.arange(len(points)), [len(c) for c in lists])
        cand = tier[np.concatenate([np.asarray(c, np.int64) for c in lists])]
        keep = np.einsum("ij,ij->i", fn[cand], normals[owner]) > 0.3
        owner, cand = owner[keep], cand[keep]
        d = np.linalg.norm(trimesh.triangles.closest_point(tris[cand], points[owner]) - points[owner], axis=1)
        np.minimum.at(out, owner, d)
    out[out > upper] = np.inf
    return out


def face_error(scan_v: np.ndarray, scan_f: np.ndarray, true_mesh: trimesh.Trimesh,
               reach: float = 0.015) -> np.ndarray:
    """(F,) float64 meters per scan face: t such that centroid + t * n lies on the true surface (n = the
    face's unit outward normal). Positive = the true surface is outside the scan (the scan is sunk in, as in a dent).
    Hits on true faces facing away from n (the far side of a thin wall) are ignored. NaN where it is
    undefined: no true surface within `reach` along the normal, or the hit lies much farther than
    the nearest true surface (|t| > 1.5 x that distance + 0.2 mm: the normal grazes a step or an edge).
    """
    cen, n = _face_frames(scan_v, scan_f)
    origins = cen - reach * n
    locs, ray_idx, tri_idx = true_mesh.ray.intersects_location(origins, n, multiple_hits=True)
    t = np.einsum("ij,ij->i", locs - origins[ray_idx], n[ray_idx]) - reach
    facing = np.einsum("ij,ij->i", true_mesh.face_normals[tri_idx], n[ray_idx]) > 0.3
    ok = facing & (np.abs(t) <= reach)
    err = np.full(len(scan_f), np.nan)
    best = np.full(len(scan_f), np.inf)
    for r, tt in zip(ray_idx[ok], t[ok]):
        if abs(tt) < best[r]:
            best[r] = abs(tt)
            err[r] = tt
    # the hit itself is a facing surface point, so the nearest one is at most |t| away; only faces
    # with |t| > 0.2 mm can fail the test
    check = np.flatnonzero(np.abs(err) > 0.0002)
    dist = closest_distance(cen[check], n[check], true_mesh, upper=np.abs(err[check]) + 1e-9)
    grazing = np.abs(err[check]) > 1.5 * dist + 0.0002
    err[check[grazing]] = np.nan
    return err


def defect_faces(scan_v: np.ndarray, scan_f: np.ndarray, info: dict) -> dict[str, list[int]]:
    """Scan face ids touched by each defect (centroid inside the dent / smoothed sector / hole rim)."""
    cen, fn = _face_frames(scan_v, scan_f)
    d = info["dent"]
    dent_ids = np.flatnonzero((np.linalg.norm(cen - d["centre"], axis=1) < d["radius"]) & (fn @ d["normal"] > 0.5))
    theta = np.arctan2(cen[:, 1], cen[:, 0])
    radial = np.stack([np.cos(theta), np.sin(theta), np.zeros_like(theta)], 1)
    on_band = (cen[:, 2] > BAND_Z[0]) & (cen[:, 2] < BAND_Z[1]) & (np.einsum("ij,ij->i", fn, radial) > 0.5)
    smooth_ids = np.flatnonzero(on_band & (_sector_weight(theta) > 0.5))
    # rim of the hole: faces with an edge used once (boundary) near the hole centre
    edges = np.sort(np.concatenate([scan_f[:, [0, 1]], scan_f[:, [1, 2]], scan_f[:, [2, 0]]]), axis=1)
    _, inv, counts = np.unique(edges, axis=0, return_inverse=True, return_counts=True)
    boundary = (counts[inv.ravel()] == 1).reshape(3, -1).any(axis=0)
    h = info["hole"]
    hole_ids = np.flatnonzero(boundary & (np.linalg.norm(cen - h["centre"], axis=1) < 3 * h["radius"]))
    return {"dent": dent_ids.tolist(), "smoothed_detail": smooth_ids.tolist(), "hole": hole_ids.tolist()}


# =============================================================================================
# Painting the albedo
# =============================================================================================
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


# =============================================================================================
# Assembly
# =============================================================================================
def demo_views(cfg: DemoConfig) -> list[tuple[str, Camera, np.ndarray]]:
    cam = Camera("turntable", "pinhole", cfg.width, cfg.height, cfg.focal, cfg.focal,
                 (cfg.width - 1) / 2, (cfg.height - 1) / 2)
    poses = orbit_poses(cfg.n_views, cfg.distance, cfg.elevations_deg, target=(0.0, 0.0, 0.105), seed=cfg.seed)
    return [(f"v{k:03d}", cam, p) for k, p in enumerate(poses)]


def _jsonable(x):
    if isinstance(x, dict):
        return {k: _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return [_jsonable(v) for v in x.tolist()]
    if isinstance(x, (np.floating, float)):
        return round(float(x), 9)
    if isinstance(x, np.integer):
        return int(x)
    return x


def build_demo(out: str | Path, cfg: DemoConfig = DemoConfig(), log=print) -> Path:
    """Generate the demo into out/scene and out/ground_truth; return out/scene/scene.yaml."""
    out = Path(out)
    scene_dir, truth_dir = out / "scene", out / "ground_truth"
    log("painting the albedo")
    albedo = Image.fromarray(paint_albedo(cfg.texture, cfg.seed), "RGB")
    truth = true_jug(cfg, albedo)
    views = demo_views(cfg)
    log(f"rendering {len(views)} views of the true jug ({len(truth.faces)} faces)")
    shots = render_views(truth, views, lit=True, light_seed=cfg.light_seed, background=cfg.background,
                         roughness=cfg.roughness)

    log("building the scan")
    scan, info = scan_jug(cfg)
    av, af, auv = make_atlas(np.asarray(scan.vertices), np.asarray(scan.faces), cfg.atlas)
    scan_uv = textured_mesh(av, af, auv, None)
    holdout = [k % cfg.holdout_every == 2 for k in range(len(views))]
    manifest = write_scene(scene_dir, scan_uv, [s[0] for s in shots], [s[1] for s in shots], views, holdout,
                           unit="meter", image_format="jpg", jpeg_quality=95,
                           exposure_jitter=cfg.exposure_jitter, white_balance_jitter=cfg.white_balance_jitter,
                           noise_sigma=cfg.noise_sigma, pose_noise_deg=cfg.pose_noise_deg,
                           pose_noise_m=cfg.pose_noise_m, seed=cfg.seed)

    log("measuring the scan against the truth")
    loaded = load_mesh(scene_dir / "mesh.obj", str(manifest))   # the faces exactly as featuretex reads them
    fe = face_error(loaded.vertices, loaded.faces, truth)
    faces = defect_faces(loaded.vertices, loaded.faces, info)
    truth_dir.mkdir(parents=True, exist_ok=True)
    with atomic_path(truth_dir / "true_mesh.ply") as tmp:
        truth.export(tmp, file_type="ply")
    with atomic_path(truth_dir / "albedo.png") as tmp:
        albedo.save(tmp, format="PNG")
    with atomic_path(truth_dir / "face_error.npy") as tmp:
        np.save(tmp, fe)
    d, h, s = info["dent"], info["hole"], info["smoothed"]
    defects = {
        "unit": "meter",
        "sign_convention": "face_error[f] = t with centroid_f + t * n_f on the true surface (n_f the scan "
                           "face's outward normal); positive = the scan lies inside the true surface; "
                           "NaN where undefined (no surface across, or the normal grazes a step)",
        "defects": [
            {"type": "dent", "centre": d["centre"], "normal": d["normal"], "radius": d["radius"],
             "depth": d["depth"], "profile": "depth * (1 - (r / radius)^2)^2 along the normals",
             "faces": faces["dent"]},
            {"type": "smoothed_detail", "what": "raised band flattened over a sector", "centre":
             _surface_point(float(np.mean(s["theta_deg"])), float(np.mean(s["z"])))[0],
             "theta_deg": s["theta_deg"], "z": s["z"], "radius": None, "depth": s["depth"],
             "faces": faces["smoothed_detail"]},
            {"type": "hole", "centre": h["centre"], "normal": h["normal"], "radius": h["radius"], "depth": None,
             "faces_removed": h["faces_removed"], "faces": faces["hole"]},
            {"type": "noise", "what": "low-frequency displacement along the normals", "rms": NOISE_RMS,
             "wavelengths": NOISE_WAVELENGTHS, "centre": None, "radius": None, "depth": None, "faces": "all"},
        ],
        "pose_noise": {"angle_deg": cfg.pose_noise_deg, "shift": cfg.pose_noise_m},
        "scan_faces": int(len(loaded.faces)),
        "true_faces": int(len(truth.faces)),
        "config": asdict(cfg),
    }
    write_json(truth_dir / "defects.json", _jsonable(defects))
    write_json(truth_dir / "true_poses.json",
               _jsonable({"note": "world_to_camera used to render each photo (the manifest's are perturbed)",
                          "views": {name: w2c for name, _, w2c in views}}))
    return manifest


# =============================================================================================
# Finding the bundled scene
# =============================================================================================
def repo_demo_dir() -> Path:
    """demo_assets/ of the source tree this module sits in (may not exist for an installed package)."""
    return Path(__file__).resolve().parent.parent / "demo_assets"


def ensure_demo_scene() -> Path:
    """Path of the demo's scene.yaml: the committed one when running from the repo, else one
    generated once into the user cache folder (XDG_CACHE_HOME or ~/.cache)/featuretex/."""
    committed = repo_demo_dir() / "scene" / "scene.yaml"
    if committed.is_file():
        return committed
    cache = user_cache_dir() / f"demo-{DEMO_VERSION}"
    manifest = cache / "scene" / "scene.yaml"
    if manifest.is_file():
        return manifest
    cache.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{cache.name}.", dir=cache.parent))
    try:
        build_demo(tmp, log=lambda msg: print(f"featuretex demo: {msg}", file=sys.stderr))
        try:
            os.replace(tmp, cache)   # atomic; if another process won the race, keep its copy
        except OSError:
            if not manifest.is_file():
                raise
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
    return manifest


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m featuretex.demo", description=__doc__.split("\n")[0])
    ap.add_argument("--out", type=Path, default=None, help="output folder (default: the repo's demo_assets/)")
    ap.add_argument("--small", action="store_true", help="a tiny, fast variant (for tests)")
    args = ap.parse_args(argv)
    out = args.out or repo_demo_dir()
    cfg = DemoConfig.small() if args.small else DemoConfig()
    manifest = build_demo(out, cfg)
    print(manifest)
    return 0


if __name__ == "__main__":
    sys.exit(main())
