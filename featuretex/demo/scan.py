"""The scan to fix: a coarser re-sampling of the true surface with low-frequency noise along the
normals, a dent, the raised band smoothed flat over a sector and a hole."""

from __future__ import annotations

import math

import numpy as np
import trimesh
from scipy.interpolate import PchipInterpolator

from featuretex.demo.config import DemoConfig
from featuretex.demo.geometry import (BAND_H, BAND_Z, OUTER, WALL_R, WALL_Z, band_bump, body_samples,
                                      handle_mesh, revolve, smoothstep, spout_offset)
from featuretex.scene.mesh import smooth_normals
from featuretex.synth import dent

# --- defects of the scan ------------------------------------------------------------------------
DENT = dict(theta_deg=-50.0, z=0.075, radius=0.020, depth=0.004)
SMOOTHED = dict(theta_from_deg=40.0, theta_to_deg=130.0, ramp_deg=8.0)
HOLE = dict(theta_deg=100.0, z=0.040, radius=0.005)
NOISE_RMS = 0.0005
NOISE_WAVELENGTHS = (0.06, 0.15)


def sector_weight(theta: np.ndarray) -> np.ndarray:
    """1 inside the smoothed sector, 0 outside, cosine ramps of SMOOTHED['ramp_deg']."""
    deg = np.degrees((theta + np.pi) % (2 * np.pi) - np.pi)
    a, b, w = SMOOTHED["theta_from_deg"], SMOOTHED["theta_to_deg"], SMOOTHED["ramp_deg"]
    return smoothstep((deg - a + w) / w) * smoothstep((b + w - deg) / w)


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


def surface_point(theta_deg: float, z: float) -> tuple[np.ndarray, np.ndarray]:
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
        return -band_bump(z) * sector_weight(theta) * outer[:, None]

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
    want, want_n = surface_point(DENT["theta_deg"], DENT["z"])
    body_outer = np.flatnonzero((np.arange(len(verts)) < len(bv)) & (normals @ want_n > 0.5))
    c = int(body_outer[np.argmin(np.linalg.norm(verts[body_outer] - want, axis=1))])
    centre_true = verts[c] - noise[c] * normals[c]
    mesh = dent(mesh, verts[c], DENT["radius"], DENT["depth"] + noise[c], normal=normals[c])

    # hole: drop the outward-facing faces within HOLE['radius'] of the spot
    hole_c, hole_n = surface_point(HOLE["theta_deg"], HOLE["z"])
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
