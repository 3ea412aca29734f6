"""The fit's per-view data computed per crop equals the full-frame computation, and is compact.

Reference everywhere: full-frame arrays from the G-buffer / mesh interpolation code
(GBuffer.uv / position / normal, lod.uv_footprint) combined over the whole frame, and the photo as
Scene.photo decodes it.
"""

import dataclasses

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from featuretex import synth
from featuretex.fit.sampler import Crop, assemble, warped_targets
from featuretex.fit.viewdata import PHOTO_MARGIN, mesh_tables, prepare_view
from featuretex.model.corrections import ViewCorrections, grid_shape
from featuretex.raster.gbuffer import _mapped_file
from featuretex.raster.stage import build_gbuffers
from featuretex.scene.camera import Camera
from featuretex.scene.loaded import load_scene
from featuretex.texels.lod import uv_footprint

from scenes import smooth_texture

W, H = 160, 120
INSIDE = (slice(40, 88), slice(50, 114))      # the middle of the sphere
BORDER = (slice(0, 40), slice(100, 160))      # touches the top and right image edges


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """A textured unit sphere, 4 views at 160 x 120, photographed by pyrender; cached G-buffers."""
    folder = tmp_path_factory.mktemp("vd")
    mesh = synth.textured_sphere(1.0, smooth_texture(64), n_lat=24, n_lon=48)
    cam = Camera("cam0", "pinhole", W, H, 1.1 * W, 1.1 * W, (W - 1) / 2, (H - 1) / 2)
    views = [(f"v{k:03d}", cam, p) for k, p in enumerate(synth.orbit_poses(4, 2.6, [-25.0, 25.0], seed=0))]
    shots = synth.render_views(mesh, views, lit=False)
    path = synth.write_scene(folder, mesh, [s[0] for s in shots], [s[1] for s in shots], views,
                             [False] * 4, image_format="png", seed=0)
    scene = load_scene(path)
    gbuffers, _ = build_gbuffers(scene, folder / "cache", quiet=True)
    return scene, gbuffers


def _full_frame_reference(scene, gbuf, view):
    """(H, W, 2) uv, (H, W) rho, (H, W) cover, (12, H, W) geo over the whole frame."""
    mesh = scene.mesh
    cov = np.asarray(gbuf.coverage)
    vdir = gbuf.position(mesh) - view.centre.astype(np.float32)
    vdir /= np.maximum(np.linalg.norm(vdir, axis=-1, keepdims=True), 1e-12)
    nrm = gbuf.normal(mesh)
    R = view.R.astype(np.float32)
    geo = np.concatenate([vdir @ R.T, nrm @ R.T, vdir, nrm], axis=-1) * cov[..., None]
    return gbuf.uv(mesh), uv_footprint(gbuf, mesh, view), cov, geo.transpose(2, 0, 1)


@pytest.mark.parametrize("window", [INSIDE, BORDER], ids=["inside", "border"])
def test_crop_tensors_equal_the_full_frame_computation(small, window):
    scene, gbuffers = small
    rows, cols = window
    for i, v in enumerate(scene.views):
        gb = gbuffers[v.name]
        assert _mapped_file(gb.data) is not None   # the crop is read from the cache file, not the map
        vd = prepare_view(scene, gb, v, i, erode_px=2)
        uv_ref, rho_ref, cov_ref, geo_ref = _full_frame_reference(scene, gb, v)
        cover, uv, rho, geo = vd.crop(rows, cols)
        c = cov_ref[rows, cols]
        assert c.sum() > 0 and (window is INSIDE or c.sum() < c.size)   # border: surface and background
        np.testing.assert_array_equal(cover.numpy(), c)
        np.testing.assert_allclose(uv.numpy(), uv_ref[rows, cols][c], rtol=0, atol=1e-6)
        np.testing.assert_allclose(rho.numpy(), rho_ref[rows, cols][c], rtol=1e-5, atol=1e-9)
        np.testing.assert_allclose(geo.numpy(), geo_ref[:, rows, cols], rtol=0, atol=1e-6)
        assert geo.shape == (12, rows.stop - rows.start, cols.stop - cols.start) and geo.stride() == (1, 12 * geo.shape[2], 12)   # channels-last memory


def test_photo_windows_and_crop_centres_are_exact(small):
    scene, gbuffers = small
    v = scene.views[1]
    vd = prepare_view(scene, gbuffers[v.name], v, 1, erode_px=2)
    photo = scene.photo(v)                                                   # (H, W, 3) float32 linear
    padded = np.pad(photo, ((PHOTO_MARGIN,) * 2, (PHOTO_MARGIN,) * 2, (0, 0)), mode="edge")
    m = PHOTO_MARGIN
    for r0, r1, c0, c1 in ((10, 50, 20, 90), (-m, 30, W - 40, W + m), (0, H, 0, W)):
        got = vd.photo_window(r0, r1, c0, c1).permute(1, 2, 0).numpy()
        np.testing.assert_array_equal(got, padded[r0 + m:r1 + m, c0 + m:c1 + m])
    loss = vd.loss_mask
    flat = np.flatnonzero(loss)
    assert vd.n_centres == len(flat) > 0
    for k in np.linspace(0, len(flat) - 1, 97).astype(int):
        assert vd.centre(int(k)) == divmod(int(flat[k]), W)


def test_warped_targets_match_sampling_the_whole_padded_photo(small):
    """Alignment fields moving the photo by ~30 px (more than PHOTO_MARGIN) still sample the
    same edge-extended photo as bilinear sampling of the whole padded photo (the earlier path)."""
    scene, gbuffers = small
    views = [prepare_view(scene, gbuffers[v.name], v, i, erode_px=0) for i, v in enumerate(scene.views)]
    corr = ViewCorrections([v.name for v in scene.views], [(W, H)] * 4, grid_shape(H, W, 40.0), 0)
    torch.manual_seed(0)
    with torch.no_grad():
        shift = torch.tensor([30.0, -25.0])[None, :, None, None]        # (dx, dy) px beyond the margin
        corr.align.copy_(shift + 5.0 * torch.randn_like(corr.align))
    S = 48
    crops = [Crop(0, 30, 50), Crop(1, 0, 0), Crop(2, H - S, W - S), Crop(3, 36, W - S)]
    batch = assemble(views, crops, S, halo=2)
    got = warped_targets(batch, corr, align=True)
    src = batch.px + corr.displacement(batch.view_idx, batch.px)
    assert float(src.detach().sub(batch.px).abs().amin(dim=(0, 1, 2)).min()) > PHOTO_MARGIN
    m = PHOTO_MARGIN
    for b, c in enumerate(crops):
        photo = torch.from_numpy(np.ascontiguousarray(scene.photo(scene.views[c.view]).transpose(2, 0, 1)))
        padded = F.pad(photo[None], (m, m, m, m), mode="replicate")
        Hp, Wp = padded.shape[2:]
        g = 2.0 * (src[b] + m) / torch.tensor([Wp - 1, Hp - 1], dtype=torch.float32) - 1.0
        ref = F.grid_sample(padded, g[None], mode="bilinear", padding_mode="border", align_corners=True)[0]
        np.testing.assert_allclose(got[b].detach().numpy(), ref.detach().numpy(), rtol=0, atol=5e-5)


def test_resident_bytes_per_fitted_view_are_below_12_per_pixel(small):
    """Measured: the nbytes of every array / tensor a fitted ViewData holds (the G-buffer is a
    memory map of the cache file and the mesh tables are shared by all views: not per view)."""
    scene, gbuffers = small
    tables = mesh_tables(scene.mesh)
    for i, v in enumerate(scene.views):
        vd = prepare_view(scene, gbuffers[v.name], v, i, erode_px=2, tables=tables)
        assert isinstance(vd.gbuf.data, np.memmap)
        held = 0
        for f in dataclasses.fields(vd):
            x = getattr(vd, f.name)
            if isinstance(x, torch.Tensor):
                held += x.element_size() * x.nelement()
            elif isinstance(x, np.ndarray):
                assert not isinstance(x, np.memmap)
                held += x.nbytes
        per_px = held / (H * W)
        assert held == vd.resident_nbytes()
        assert 3.0 <= per_px < 12.0, per_px    # at least the photo's 3 bytes: the count sees it


def test_cached_crop_geometry_is_bit_identical_to_the_streamed_one(small):
    """The precomputed geometry is the same arithmetic over the object's box, so every crop (inside,
    at the image border, reaching off the box) must equal the streamed one exactly."""
    scene, gbuffers = small
    tables = mesh_tables(scene.mesh)
    for i, v in enumerate(scene.views):
        streamed = prepare_view(scene, gbuffers[v.name], v, i, erode_px=2, tables=tables)
        cached = prepare_view(scene, gbuffers[v.name], v, i, erode_px=2, tables=tables)
        cached.cache_geometry()
        assert cached.geometry is not None and streamed.geometry is None
        r0, r1, c0, c1 = cached.bbox
        assert cached.geometry.nbytes == cached.geometry_nbytes() == (r1 - r0) * (c1 - c0) * 61
        assert cached.resident_nbytes() == streamed.resident_nbytes() + cached.geometry.nbytes
        off_box = (slice(max(r0 - 20, 0), max(r0 - 20, 0) + 48), slice(max(c0 - 30, 0), max(c0 - 30, 0) + 64))
        for rows, cols in (INSIDE, BORDER, off_box, (slice(0, H), slice(0, W))):
            for a, b in zip(cached.crop(rows, cols), streamed.crop(rows, cols)):
                assert a.shape == b.shape and a.stride() == b.stride() and a.dtype == b.dtype
                assert torch.equal(a, b)
