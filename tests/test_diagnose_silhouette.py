"""Silhouette consistency (featuretex.diagnose.silhouette) on spheres photographed by pyrender, an
independent OpenGL renderer whose masks are its MSAA coverage (>= 1/2), against the scan's G-buffers.

References, computed here without the module: the analytic offset along the scan normal from a scan
texel to the true (unit) sphere, by ray-sphere intersection; and the pixel shift a known camera
translation causes, by the pinhole relation (shift x f / depth).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from featuretex import synth
from featuretex.diagnose import DiagnoseConfig, diagnose
from featuretex.diagnose.classify import GEOMETRY, ramp
from featuretex.diagnose.grid import texel_edge
from featuretex.diagnose.silhouette import silhouette_evidence
from featuretex.raster.stage import build_gbuffers
from featuretex.raster.uvspace import rasterise_uv
from featuretex.scene.camera import Camera
from featuretex.scene.loaded import load_scene
from tests.scenes import smooth_texture

W, H = 320, 240
F = 1.1 * W
DISTANCE = 3.2
D = 128                                   # working grid
DENT = dict(centre=(1.0, 0.0, 0.0), radius=0.6, depth=0.03)   # gentle: the dented surface stays convex
SHIFT_PX = 3.0                            # camera translation of the pose-error scene, px at the centre
CFG = DiagnoseConfig(max_grid=D)


def views() -> list:
    cam = Camera("cam0", "pinhole", W, H, F, F, (W - 1) / 2, (H - 1) / 2)
    poses = synth.orbit_poses(24, DISTANCE, [-30.0, 0.0, 30.0], seed=3)
    return [(f"v{k:03d}", cam, p) for k, p in enumerate(poses)]


def shifted(spec: list, px: float) -> list:
    """The same views with every camera moved along its own x axis so that the sphere's centre
    (at depth DISTANCE) projects `px` pixels further left: x' = x - f dx / z."""
    out = []
    for name, cam, w2c in spec:
        m = np.array(w2c, np.float64)
        m[0, 3] -= px * DISTANCE / F
        out.append((name, cam, m))
    return out


_BUILT: dict = {}


def build(kind: str, tmp_path_factory):
    if kind not in _BUILT:
        truth = synth.textured_sphere(1.0, smooth_texture(256, 1), n_lat=64, n_lon=128)
        scan = synth.dent(truth, DENT["centre"], DENT["radius"], DENT["depth"]) if kind == "dent" else truth
        spec = views()
        shots = synth.render_views(truth, spec, lit=False, texture_filter="mipmap")
        stored = shifted(spec, SHIFT_PX) if kind == "pose" else spec
        folder = tmp_path_factory.mktemp(f"silh-{kind}")
        path = synth.write_scene(folder, scan, [s[0] for s in shots], [s[1] for s in shots], stored,
                                 [False] * len(spec), image_format="png", seed=0)
        scene = load_scene(path)
        gbuffers, _ = build_gbuffers(scene, Path(folder) / "cache", quiet=True)
        grid = rasterise_uv(scene.mesh, D)
        _BUILT[kind] = (scene, gbuffers, grid)
    return _BUILT[kind]


def evidence(kind: str, tmp_path_factory, **overrides):
    scene, gbuffers, grid = build(kind, tmp_path_factory)
    cfg = DiagnoseConfig(max_grid=D, **overrides)
    ev = silhouette_evidence(scene, gbuffers, grid, texel_edge(scene.mesh, D), cfg)
    assert ev is not None
    return scene, grid, ev


def sphere_offset(pos: np.ndarray, nrm: np.ndarray) -> np.ndarray:
    """(N,) analytic signed offset t along unit normals n from points p to the unit sphere
    (|p + t n| = 1, the root nearest 0 for outward normals, p . n > 0): + = the sphere lies
    outside the scan."""
    b = np.einsum("ij,ij->i", pos, nrm)
    c = np.einsum("ij,ij->i", pos, pos) - 1.0
    return -b + np.sqrt(np.maximum(b * b - c, 0.0))


def test_exact_sphere_has_no_silhouette_gaps(tmp_path_factory):
    scene, grid, ev = evidence("exact", tmp_path_factory)
    v = grid.valid
    measured = np.isfinite(ev.raw) & v
    assert measured.mean() > 0.05          # many texels lie on some view's outline: a real check
    # reference: zero offset everywhere; the spread field, in pixels of its own footprint, stays
    # below half a pixel wherever it is defined
    px = np.abs(ev.offset[v]) / ev.footprint[v]
    assert np.isfinite(px).mean() > 0.5
    assert np.nanmax(px) < 0.5, np.nanmax(px)
    tol = CFG.geometry_tol_fraction * scene.mesh.extent
    assert np.nanmax(ramp(np.abs(ev.offset[v]) / tol)) < 0.5


def test_dent_offset_at_the_outline_matches_the_analytic_sphere(tmp_path_factory):
    scene, grid, ev = evidence("dent", tmp_path_factory)
    v = grid.valid
    pos, nrm = grid.position[v].astype(np.float64), grid.normal[v].astype(np.float64)
    truth = np.full(v.shape, np.nan)
    truth[v] = sphere_offset(pos, nrm)
    # the reference really is the dent: ~depth at its centre, ~0 far from it
    centre = np.argmin(np.linalg.norm(grid.position - np.array(DENT["centre"]), axis=2))
    assert abs(truth.ravel()[centre] - DENT["depth"]) < 0.1 * DENT["depth"]
    # rim texels: on some view's outline, where the dent offsets the surface by > 30 % of its depth
    rim = np.isfinite(ev.raw) & v & (truth > 0.3 * DENT["depth"])
    assert rim.sum() >= 20, rim.sum()
    rel = (ev.raw[rim] - truth[rim]) / truth[rim]
    assert abs(np.median(rel)) < 0.25, np.median(rel)
    # the right sign (the photos show surface outside): never negative, and found wherever the
    # true offset is clear of the mask-quantisation deadband (over twice it, in the texel's pixels)
    assert np.all(ev.raw[rim] >= 0)
    clear = rim & (truth > 2 * CFG.silhouette_deadband_px * ev.footprint)
    assert clear.sum() >= 10 and np.mean(ev.raw[clear] > 0) > 0.9, (clear.sum(), np.mean(ev.raw[clear] > 0))
    # far from the dent the outline agrees with the photos
    far = np.isfinite(ev.raw) & v & (np.abs(truth) < 1e-3)
    assert np.mean(np.abs(ev.raw[far]) < 1e-9) > 0.95


def test_dent_is_geometry_in_the_diagnosis(tmp_path_factory):
    """With the paint's evidence alone the sweep would need texture; here the silhouettes mark the
    dent and give its displacement the right sign."""
    scene, gbuffers, grid = build("dent", tmp_path_factory)
    from featuretex.bake.baseline import bake_baseline

    texels = rasterise_uv(scene.mesh, D)
    tex = bake_baseline(scene, gbuffers, texels).texture_lin
    dg = diagnose(scene, gbuffers, texels, tex, CFG)
    assert "silhouette_offset" in dg.extra
    v = texels.valid
    truth = np.full(v.shape, np.nan)
    truth[v] = sphere_offset(texels.position[v].astype(np.float64), texels.normal[v].astype(np.float64))
    core = v & (truth > 0.6 * DENT["depth"])
    far = v & (np.abs(truth) < 1e-3)
    assert np.mean(dg.cls[core] == GEOMETRY) > 0.5
    assert np.mean(dg.cls[far] == GEOMETRY) < 0.02
    d = dg.displacement[core]
    assert np.isfinite(d).mean() > 0.5 and np.all(d[np.isfinite(d)] > 0)


def test_global_pose_error_is_not_geometry(tmp_path_factory):
    scene, grid, ev = evidence("pose", tmp_path_factory)
    v = grid.valid
    # reference: each camera moved so the sphere's centre shifts SHIFT_PX left in the stored pose,
    # so the photo's mask lies SHIFT_PX to the right of the mesh's outline
    shifts = np.array([c[1] for c in ev.calibration.values()])
    assert np.all(np.abs(shifts - SHIFT_PX) < 0.5), shifts
    px = np.abs(ev.offset[v]) / ev.footprint[v]
    assert np.nanmax(px) < 0.5, np.nanmax(px)
    # without removing the global part the same scene does read as geometry (the check can fail)
    _, _, raw = evidence("pose", tmp_path_factory, silhouette_remove_global=False)
    assert np.nanmax(np.abs(raw.offset[v]) / raw.footprint[v]) > 1.0
