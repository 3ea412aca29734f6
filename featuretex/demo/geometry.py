"""The true jug's shape: a surface of revolution (foot, belly, raised band, neck, rolled rim, inner
wall) plus a swept handle, in meters, +z up, base at z = 0, spout towards +x, handle towards -x."""

from __future__ import annotations

import math

import numpy as np
import trimesh
from PIL import Image
from scipy.interpolate import PchipInterpolator, make_interp_spline

from featuretex.demo.config import DemoConfig
from featuretex.synth import textured_mesh

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

# body texture layout: v in [V_BODY, 1] (profile), handle in [V_HANDLE0, V_HANDLE1] (around the tube)
V_BODY, V_HANDLE0, V_HANDLE1 = 0.20, 0.005, 0.175
INNER_UV_WEIGHT = 0.35   # texel density of the hardly-seen inside relative to the outside


def smoothstep(x: np.ndarray) -> np.ndarray:
    x = np.clip(x, 0.0, 1.0)
    return x * x * (3 - 2 * x)


def band_bump(z: np.ndarray) -> np.ndarray:
    """Radial height of the raised band at height z (meters), 0 outside it."""
    a, b = BAND_Z
    return BAND_H * smoothstep((z - a) / BAND_RAMP) * smoothstep((b - z) / BAND_RAMP)


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
