"""Payoff estimates (featuretex.diagnose.payoff) against the real outcome of the fix they estimate.

A textured plane photographed by pyrender (an independent OpenGL renderer) with a dented scan:
the geometry payoff, estimated from the fitted views only, is compared with the held-out PSNR gain
measured when the classical bake is made on the true (flat) surface instead of the dented scan.
With exact geometry the estimate must be about zero. The leave-one-out error is checked against a
direct computation on a two-view case (the other view's colour is the prediction).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from featuretex import synth
from featuretex.bake.baseline import bake_baseline
from featuretex.diagnose import DiagnoseConfig, diagnose
from featuretex.raster.stage import build_gbuffers
from featuretex.raster.uvspace import rasterise_uv
from featuretex.scene.loaded import load_scene
from featuretex.scoring.heldout import score_method
from featuretex.scoring.render import render_texture

from test_diagnose import DENT, cameras, plane

CFG = DiagnoseConfig(max_grid=128)


def scene_pair(folder: Path, seed: int, dented: bool):
    """(scan scene, true scene) of the plane, 16 views of which every 4th is held out."""
    flat = plane(seed)
    scan = synth.dent(flat, DENT["centre"], DENT["radius"], DENT["depth"], normal=(0, 0, 1)) if dented else flat
    views = cameras(seed, (35.0, 55.0))[:12] + cameras(seed + 7, (45.0,))[:4]
    views = [(f"v{k:03d}", c, p) for k, (_, c, p) in enumerate(views)]
    shots = synth.render_views(flat, views, lit=False, texture_filter="mipmap")
    held = [k % 4 == 3 for k in range(len(views))]
    out = []
    for name, mesh in (("scan", scan), ("true", flat)):
        path = synth.write_scene(folder / name, mesh, [s[0] for s in shots], [s[1] for s in shots], views, held,
                                 image_format="png", seed=seed, noise_sigma=0.01)
        scene = load_scene(path)
        out.append((scene, build_gbuffers(scene, folder / name / "cache", quiet=True)[0]))
    return out


def heldout_plain_psnr(scene, gbuffers, size: int = 128) -> float:
    texels = rasterise_uv(scene.mesh, size)
    tex = bake_baseline(scene, gbuffers, texels).texture_lin
    renders = {v.name: render_texture(gbuffers[v.name], scene.mesh, tex) for v in scene.manifest.heldout}
    return score_method(scene, gbuffers, renders)["psnr"]


@pytest.mark.parametrize("dented", [True, False])
def test_geometry_payoff_matches_the_measured_gain(dented, tmp_path):
    (scan, g_scan), (true, g_true) = scene_pair(tmp_path, 0, dented)
    texels = rasterise_uv(scan.mesh, 128)
    tex = bake_baseline(scan, g_scan, texels).texture_lin
    dg = diagnose(scan, g_scan, texels, tex, CFG)
    estimate = dg.payoff_db["geometry"]
    measured = heldout_plain_psnr(true, g_true) - heldout_plain_psnr(scan, g_scan)
    if dented:
        # held-out truth: the classical bake on the flat surface against the same bake on the dent
        assert measured > 0.3, measured
        assert 0.5 * measured < estimate < 2.0 * measured, (estimate, measured)
        geo = [r for r in dg.regions if r["class"] == "geometry"]
        assert geo and geo[0]["payoff_db"]["geometry"] > geo[0]["payoff_db"]["texture"]
    else:
        assert abs(estimate) < 0.05, estimate
    assert len(dg.regions) == len({r["number"] for r in dg.regions})
    for r in dg.regions:
        assert set(r) >= {"class", "area", "centre", "payoff_db"} and len(r["centre"]) == 3


def test_leave_one_out_error_with_two_views():
    """Two views of one texel: each view's prediction is the other's colour, so the squared error
    is |srgb(a) - srgb(b)|^2 per view, weighted by the pixels the texel covers (direct formula)."""
    from types import SimpleNamespace

    from featuretex.diagnose.payoff import loo_squared_error
    from featuretex.scene.colour import linear_to_srgb

    class Cam:
        def project(self, pc):
            return np.zeros((len(pc), 2))

    def view(colour):
        v = SimpleNamespace(to_camera=lambda p: p + [0, 0, 2.0], R=np.eye(3), camera=Cam())
        return SimpleNamespace(view=v, idx=np.array([0]), cos=np.array([0.8], np.float32), depth=np.array([2.0]),
                               focal=100.0, correction=None,
                               sample_colour=lambda xy, c=colour: np.array([c], np.float32))

    a, b = np.array([0.2, 0.3, 0.4]), np.array([0.25, 0.3, 0.5])
    se, px = loo_squared_error([view(a), view(b)], np.zeros((1, 3)), np.array([[0, 0, 1.0]]), np.array([1e-4]))
    pixels = 1e-4 * 0.8 * (100.0 / 2.0) ** 2
    e = ((linear_to_srgb(a) - linear_to_srgb(b)) ** 2).mean()
    assert px[0] == pytest.approx(2 * pixels)
    assert se[0] == pytest.approx(2 * pixels * e, rel=1e-5)
