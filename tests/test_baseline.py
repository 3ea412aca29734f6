"""The classical bake recovers a known texture when the geometry is exact (reference: the texture
the scene was rendered with by pyrender, an independent OpenGL renderer)."""

import numpy as np
import pytest

from featuretex.bake.baseline import bake_baseline
from featuretex.raster.stage import build_gbuffers
from featuretex.raster.uvspace import rasterise_uv
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.loaded import load_scene
from featuretex.scoring import metrics
from featuretex.texels.gutter import fill_texture

from scenes import smooth_texture, sphere_scene


@pytest.fixture(scope="module")
def exact_sphere(tmp_path_factory):
    folder = tmp_path_factory.mktemp("sphere")
    path, truth = sphere_scene(folder, texture=smooth_texture(128))
    scene = load_scene(path)
    gbuffers, _ = build_gbuffers(scene, folder / "cache", quiet=True)
    return scene, gbuffers, truth


def test_baseline_recovers_known_texture(exact_sphere):
    scene, gbuffers, truth = exact_sphere
    texels = rasterise_uv(scene.mesh, 128)
    base = bake_baseline(scene, gbuffers, texels)
    baked = linear_to_srgb(base.texture_lin)
    covered = base.seen & texels.valid
    assert covered.mean() > 0.5
    # pyrender filtered the texture bilinearly on its sRGB bytes; compare on sRGB values
    p = metrics.psnr(baked, truth, covered)
    assert p >= 35.0, p


def test_fill_keeps_measured_texels_and_pads_gutter():
    rng = np.random.default_rng(0)
    tex = rng.uniform(0, 1, (64, 64, 3)).astype(np.float32)
    on_surface = np.zeros((64, 64), bool)
    on_surface[10:30, 10:30] = True
    seen = on_surface.copy()
    seen[15:18, 15:18] = False           # an unseen spot inside the island
    out = fill_texture(tex, seen, on_surface, gutter=4)
    assert np.array_equal(out[seen], tex[seen])
    # the gutter ring copies the nearest island texel (scipy distance transform as the reference)
    assert np.allclose(out[8, 12], out[10, 12]) and np.allclose(out[12, 33], out[12, 29])
    # the unseen spot is filled from its neighbours: inside their value range
    lo, hi = tex[13:20, 13:20][seen[13:20, 13:20]].min(0), tex[13:20, 13:20][seen[13:20, 13:20]].max(0)
    assert np.all(out[16, 16] >= lo - 1e-6) and np.all(out[16, 16] <= hi + 1e-6)
