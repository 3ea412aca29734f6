"""Synthetic scenes (featuretex.synth) against outside references: OpenCV projection, scipy's bilinear
sampling, trimesh's own (non-Embree) ray caster, pyrender's published shading model, sphere geometry,
scipy rotations and the featuretex manifest reader."""

from __future__ import annotations

import math

import cv2
import numpy as np
import pytest
import trimesh
from PIL import Image
from scipy.ndimage import binary_dilation, binary_erosion, map_coordinates
from scipy.spatial.transform import Rotation

from featuretex import synth
from featuretex.scene.camera import Camera
from featuretex.scene.images import load_mask, load_photo
from featuretex.scene.manifest import read_manifest


def iec_encode(x):
    # IEC 61966-2-1:1999 encoding, written out independently of featuretex.scene.colour
    x = np.clip(x, 0, 1)
    return np.where(x <= 0.0031308, 12.92 * x, 1.055 * x ** (1 / 2.4) - 0.055)


def iec_decode(v):
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


def pixel_rays(cam: Camera, w2c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """World ray origin (3,) and directions (H, W, 3) through pixel centres (pinhole, OpenCV axes)."""
    ys, xs = np.mgrid[0:cam.height, 0:cam.width].astype(np.float64)
    d_cam = np.stack([(xs - cam.cx) / cam.fx, (ys - cam.cy) / cam.fy, np.ones_like(xs)], -1)
    R, t = w2c[:3, :3], w2c[:3, 3]
    return -R.T @ t, d_cam @ R


# ---------------------------------------------------------------------------------------------
# cameras
# ---------------------------------------------------------------------------------------------
def test_orbit_poses_look_at_the_target_with_opencv_axes():
    target = np.array([0.1, -0.2, 0.3])
    poses = synth.orbit_poses(17, 2.5, [-10.0, 20.0, 60.0], target=target, seed=4)
    assert len(poses) == 17
    K = np.array([[500.0, 0, 320.0], [0, 500.0, 240.0], [0, 0, 1]])
    elevations = []
    for p in poses:
        R, t = p[:3, :3], p[:3, 3]
        assert np.allclose(R.T @ R, np.eye(3), atol=1e-12) and abs(np.linalg.det(R) - 1) < 1e-12
        centre = -R.T @ t
        assert abs(np.linalg.norm(centre - target) - 2.5) < 1e-12
        elevations.append(math.degrees(math.asin((centre - target)[2] / 2.5)))
        # OpenCV's projectPoints is the reference for the axes: the target lands on the principal
        # point, and a point above it (+z world up) lands higher in the image (smaller y)
        rvec, _ = cv2.Rodrigues(R)
        px, _ = cv2.projectPoints(np.array([target, target + [0, 0, 0.05]]), rvec, t, K, None)
        px = px.reshape(-1, 2)
        assert np.allclose(px[0], [320.0, 240.0], atol=1e-6)
        assert px[1, 1] < px[0, 1] - 1.0
    # views are shared by cos(elevation), largest remainder first (worked by hand):
    # 17 * (0.985, 0.940, 0.500) / 2.425 = 6.90, 6.59, 3.51 -> 6, 6, 3 + the two largest remainders
    counts = [int(np.sum(np.isclose(elevations, e, atol=1e-9))) for e in (-10.0, 20.0, 60.0)]
    assert counts == [7, 7, 3]


def test_perturbed_pose_is_wrong_by_exactly_the_asked_amount():
    rng = np.random.default_rng(3)
    pose = synth.look_at([0.4, -0.3, 0.2], [0, 0, 0.1])
    bad = synth.perturb_pose(pose, 0.15, 0.0005, rng)
    # scipy's rotation magnitude is the reference for the angle between the two orientations
    angle = Rotation.from_matrix(bad[:3, :3] @ pose[:3, :3].T).magnitude()
    assert abs(math.degrees(angle) - 0.15) < 1e-9
    c0 = -pose[:3, :3].T @ pose[:3, 3]
    c1 = -bad[:3, :3].T @ bad[:3, 3]
    assert abs(np.linalg.norm(c1 - c0) - 0.0005) < 1e-12


# ---------------------------------------------------------------------------------------------
# meshes
# ---------------------------------------------------------------------------------------------
def test_textured_sphere_is_closed_outward_and_uv_in_range():
    s = synth.textured_sphere(0.5, synth.checker_texture(64, 4), n_lat=40, n_lon=80)
    # volume of a ball 4/3 pi r^3; the inscribed polyhedron is a little smaller, positive = outward
    ball = 4 / 3 * math.pi * 0.5 ** 3
    assert 0.99 * ball < s.volume < ball
    uv = s.visual.uv
    assert uv.min() >= 0 and uv.max() <= 1
    assert np.all(s.area_faces > 1e-10)


def test_dent_depth_and_extent_on_a_sphere():
    R = 1.0
    s = synth.textured_sphere(R, None, n_lat=64, n_lon=128)
    v0 = s.vertices.copy()
    # centre: a vertex on the equator on the uv seam (lon 0), which exists twice (seam columns)
    c_idx = int(np.argmin(np.linalg.norm(v0 - [R, 0, 0], axis=1)))
    centre = v0[c_idx]
    assert np.linalg.norm(centre - [R, 0, 0]) < 1e-12
    depth, radius = 0.05, 0.3
    d = synth.dent(s, centre, radius, depth)
    assert np.array_equal(s.vertices, v0), "the input mesh must not be modified"
    r_new = np.linalg.norm(d.vertices, axis=1)
    # on a sphere the displacement is radial: |p'| = R - depth * (1 - (dist/radius)^2)^2 (the
    # profile is stated in the docstring; the radial direction is the sphere's exact normal)
    dist = np.linalg.norm(v0 - centre, axis=1)
    expect = R - depth * np.clip(1 - (dist / radius) ** 2, 0, None) ** 2
    assert abs(r_new[c_idx] - (R - depth)) < 1e-12
    assert np.max(np.abs(r_new - expect)) < 2e-4
    assert np.allclose(d.vertices[dist >= radius], v0[dist >= radius])
    # vertices that shared a position (the seam) still do
    same = np.flatnonzero(np.linalg.norm(v0 - centre, axis=1) < 1e-12)
    assert len(same) == 2 and np.allclose(d.vertices[same[0]], d.vertices[same[1]], atol=1e-15)


def test_fine_print_is_deterministic_and_scales_with_stroke_width():
    a = synth.fine_print_coverage(200, 80, glyph_px=10, stroke_px=1.0, seed=5)
    b = synth.fine_print_coverage(200, 80, glyph_px=10, stroke_px=1.0, seed=5)
    c = synth.fine_print_coverage(200, 80, glyph_px=10, stroke_px=1.0, seed=6)
    thick = synth.fine_print_coverage(200, 80, glyph_px=10, stroke_px=2.0, seed=5)
    assert np.array_equal(a, b) and not np.array_equal(a, c)
    assert 0.03 < a.mean() < 0.4 and thick.mean() > 1.5 * a.mean()
    # supersampled strokes leave partial coverage (anti-aliased edges), not just 0 and 1
    assert np.mean((a > 0.05) & (a < 0.95)) > 0.02


# ---------------------------------------------------------------------------------------------
# rendering
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("filt,order", [("linear", 1), ("nearest", 0)])
def test_flat_render_reproduces_the_texture(filt, order):
    tex = synth.fine_print_texture(128, glyph_px=10, stroke_px=1.6, seed=2)
    T = np.asarray(tex, np.float64) / 255.0
    plane = synth.textured_plane(0.2, tex)
    cam = Camera("c", "pinhole", 160, 120, 300.0, 300.0, 79.5, 59.5)
    w2c = synth.look_at([0.03, -0.05, 0.35], [0, 0, 0], up=(0, 1, 0))
    [(img, mask)] = synth.render_views(plane, [("v", cam, w2c)], lit=False, texture_filter=filt)
    # reference: ray-plane intersection at each pixel centre, then the texture sampled by
    # scipy.ndimage.map_coordinates (order 1 = bilinear, 0 = nearest) on the same sRGB bytes
    origin, dirs = pixel_rays(cam, w2c)
    hit = origin + (-origin[2] / dirs[..., 2])[..., None] * dirs
    u, v = hit[..., 0] / 0.2 + 0.5, hit[..., 1] / 0.2 + 0.5
    inside = binary_erosion(mask, iterations=2) & (u > 0.02) & (u < 0.98) & (v > 0.02) & (v < 0.98)
    assert inside.sum() > 10000

    def sample(du_px=0.0):
        rows, cols = (1 - v) * 128 - 0.5, u * 128 - 0.5 + du_px
        return np.stack([map_coordinates(T[..., k], [rows, cols], order=order, mode="nearest")
                         for k in range(3)], -1)

    got = iec_encode(img)   # the module promises linear = IEC decode of the filtered texture bytes
    err = np.abs(got - sample())[inside].max(axis=-1)
    if order == 1:
        assert err.max() < 2.5 / 255     # GPU bilinear weights are 8-bit fixed point (common practice)
    else:
        assert np.mean(err > 2.5 / 255) < 0.03   # only texel-boundary ties differ
    # the comparison has teeth: half a texel of misplacement is far worse
    assert np.abs(got - sample(0.5))[inside].mean() > 5 * np.abs(got - sample())[inside].mean()


def test_mask_and_uv_of_a_sphere_match_trimesh_ray_caster():
    tex = synth.checker_texture(64, 8)
    sphere = synth.textured_sphere(1.0, tex, n_lat=24, n_lon=48)
    cam = Camera("c", "pinhole", 96, 72, 110.0, 110.0, 47.5, 35.5)
    w2c = synth.orbit_poses(1, 3.5, [30.0], seed=1)[0]
    [(img, mask)] = synth.render_views(sphere, [("v", cam, w2c)], lit=False, texture_filter="nearest")
    origin, dirs = pixel_rays(cam, w2c)
    dirs = dirs.reshape(-1, 3)
    caster = trimesh.ray.ray_triangle.RayMeshIntersector(sphere)   # trimesh's own, not Embree
    tri, ray, loc = caster.intersects_id(np.broadcast_to(origin, dirs.shape), dirs, multiple_hits=False,
                                         return_locations=True)
    ref = np.zeros(len(dirs), bool)
    ref[ray] = True
    ref = ref.reshape(mask.shape)
    # the depth mask takes one MSAA sample per pixel, so it may differ on the silhouette only
    diff = mask != ref
    edge = binary_dilation(ref) & ~binary_erosion(ref)
    assert np.all(edge[diff]) and diff.sum() < 0.05 * ref.sum()
    # the colour at each hit is the texel at the hit's interpolated uv (v up: row = (1 - v) T)
    bary = trimesh.triangles.points_to_barycentric(sphere.triangles[tri], loc)
    uv = np.einsum("ij,ijk->ik", bary, sphere.visual.uv[sphere.faces[tri]])
    T = np.asarray(tex)
    want = T[np.clip(((1 - uv[:, 1]) * 64).astype(int), 0, 63), np.clip((uv[:, 0] * 64).astype(int), 0, 63)]
    got = np.round(iec_encode(img.reshape(-1, 3)[ray]) * 255)
    interior = binary_erosion(ref, iterations=2).ravel()[ray]
    agree = np.all(np.abs(got - want) <= 2, axis=1)
    assert agree[interior].mean() > 0.95


@pytest.mark.parametrize("incidence_deg,intensity", [(60.0, 3.0), (0.0, 1.5), (120.0, 3.0)])
def test_lit_render_gives_the_shader_linear_radiance(incidence_deg, intensity):
    albedo_byte, ambient, rough = 200, 0.1, 1.0
    tex = Image.new("RGB", (8, 8), (albedo_byte,) * 3)
    plane = synth.textured_plane(0.5, tex)
    cam = Camera("c", "pinhole", 64, 48, 80.0, 80.0, 31.5, 23.5)
    w2c = synth.look_at([0, 0, 1.0], [0, 0, 0], up=(0, 1, 0))
    a = math.radians(incidence_deg)
    to_light = np.array([math.sin(a), 0.0, math.cos(a)])
    [(img, _)] = synth.render_views(plane, [("v", cam, w2c)], lit=True, ambient=ambient, roughness=rough,
                                    lights=[(-to_light, intensity)])
    # Reference: the metallic-roughness BRDF of pyrender's mesh.frag (the glTF 2.0 sample-viewer
    # model) written out for a dielectric: F0 = 0.04, c_diff = albedo * 0.96, Schlick Fresnel,
    # Smith-Schlick G with k = (r + 1)^2 / 8, GGX D with a = r^2; plus ambient * albedo.
    alb = float(iec_decode(albedo_byte / 255.0))
    n, view = np.array([0, 0, 1.0]), np.array([0, 0, 1.0])
    h = (to_light + view) / np.linalg.norm(to_light + view)
    nl = min(max(float(n @ to_light), 0.001), 1.0)
    nv, nh, vh = 1.0, float(n @ h), float(view @ h)
    F = 0.04 + 0.96 * (1 - vh) ** 5
    k = (rough + 1) ** 2 / 8
    G = nv / (nv * (1 - k) + k) * nl / (nl * (1 - k) + k)
    a2 = (rough * rough) ** 2
    D = a2 / (math.pi * (nh * nh * (a2 - 1) + 1) ** 2)
    expect = nl * intensity * ((1 - F) * alb * 0.96 / math.pi + F * G * D / (4 * nl * nv + 0.001)) + ambient * alb
    centre = img[22:26, 30:34].reshape(-1, 3)
    # the only slack is 8-bit output quantisation after the 1/2.2 power: half a code step, carried
    # through d(y^2.2)/dy (20 % margin for the shader's float arithmetic)
    y = expect ** (1 / 2.2)
    tol = 1.2 * 2.2 * y ** 1.2 * (0.5 / 255) + 1e-4
    assert np.all(np.abs(centre - expect) <= tol), (centre.mean(), expect, tol)


def test_distorted_camera_is_refused():
    cam = Camera("c", "brown", 32, 24, 30.0, 30.0, 15.5, 11.5, (0.1, 0, 0, 0, 0))
    with pytest.raises(ValueError, match="distortion"):
        synth.render_views(synth.textured_plane(1.0, None), [("v", cam, synth.look_at([0, 0, 2], [0, 0, 0],
                                                                                     up=(0, 1, 0)))], lit=False)


# ---------------------------------------------------------------------------------------------
# the scene writer
# ---------------------------------------------------------------------------------------------
def _tiny_scene_inputs(n: int = 3):
    tex = synth.checker_texture(32, 4)
    mesh = synth.textured_sphere(0.3, tex, n_lat=12, n_lon=24)
    cam = Camera("cam0", "pinhole", 40, 30, 45.0, 45.0, 19.5, 14.5)
    views = [(f"v{k}", cam, p) for k, p in enumerate(synth.orbit_poses(n, 1.5, [15.0], seed=2))]
    rng = np.random.default_rng(0)
    photos = [rng.uniform(0.0, 1.0, (30, 40, 3)).astype(np.float32) for _ in range(n)]
    masks = [rng.uniform(size=(30, 40)) > 0.5 for _ in range(n)]
    return mesh, photos, masks, views


def test_written_scene_is_accepted_by_the_manifest_reader(tmp_path):
    mesh, photos, masks, views = _tiny_scene_inputs()
    path = synth.write_scene(tmp_path / "s", mesh, photos, masks, views, [False, True, False], unit="centimeter",
                             image_format="png", seed=1)
    man = read_manifest(path)          # featuretex's own reader is the contract (docs/contracts.md)
    assert man.unit == "centimeter" and [v.name for v in man.views] == ["v0", "v1", "v2"]
    assert [v.holdout for v in man.views] == [False, True, False]
    cam = man.cameras["cam0"]
    assert (cam.width, cam.height, cam.fx, cam.cx, cam.cy) == (40, 30, 45.0, 19.5, 14.5)
    for v, (_, _, w2c), photo, mask in zip(man.views, views, photos, masks):
        assert np.allclose(v.world_to_camera, w2c, atol=1e-11)
        # no jitter, no noise: the PNG holds the IEC-encoded photo rounded to 8 bits (Pillow decodes it)
        stored = np.asarray(Image.open(v.image), np.float64)
        assert np.array_equal(stored, np.round(iec_encode(photo.astype(np.float64)) * 255))
        assert np.array_equal(np.asarray(Image.open(v.mask)) == 255, mask)
        # and featuretex's loaders accept them at the camera's size
        assert load_photo(v.image, str(path), v.name, (40, 30)).shape == (30, 40, 3)
        assert np.array_equal(load_mask(v.mask, str(path), v.name, (40, 30)), mask)
    loaded = trimesh.load(man.mesh, process=False, force="mesh")
    assert len(loaded.faces) == len(mesh.faces)
    assert np.allclose(loaded.visual.uv[loaded.faces], mesh.visual.uv[mesh.faces], atol=1e-6)


def test_scene_writer_is_deterministic_and_seeded(tmp_path):
    mesh, photos, masks, views = _tiny_scene_inputs()
    kw = dict(image_format="jpg", exposure_jitter=0.1, white_balance_jitter=0.05, noise_sigma=0.01,
              pose_noise_deg=0.2, pose_noise_m=0.001)
    a = synth.write_scene(tmp_path / "a", mesh, photos, masks, views, [False] * 3, seed=9, **kw).parent
    b = synth.write_scene(tmp_path / "b", mesh, photos, masks, views, [False] * 3, seed=9, **kw).parent
    c = synth.write_scene(tmp_path / "c", mesh, photos, masks, views, [False] * 3, seed=10, **kw).parent
    files = sorted(p.relative_to(a) for p in a.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(b) for p in b.rglob("*") if p.is_file())
    assert all((a / f).read_bytes() == (b / f).read_bytes() for f in files)
    assert (a / "images/v0.jpg").read_bytes() != (c / "images/v0.jpg").read_bytes()
    man = read_manifest(a / "scene.yaml")
    for v, (_, _, w2c) in zip(man.views, views):
        angle = math.degrees(Rotation.from_matrix(v.R @ w2c[:3, :3].T).magnitude())
        assert abs(angle - 0.2) < 1e-6


def test_exposure_jitter_is_one_gain_per_photo_and_channel():
    rng = np.random.default_rng(1)
    lin = np.full((20, 20, 3), 0.2, np.float32) * rng.uniform(0.5, 1.5, (20, 20, 1)).astype(np.float32)
    outs = [synth.develop_photo(lin, np.random.default_rng(k), exposure_jitter=0.1, white_balance_jitter=0.05,
                                noise_sigma=0.0) for k in range(3)]
    gains = []
    for o in outs:
        ratio = iec_decode(o / 255.0) / lin
        assert np.all(np.std(ratio.reshape(-1, 3), axis=0) < 0.02 * ratio.mean())   # uniform per channel
        gains.append(ratio.reshape(-1, 3).mean(axis=0))
    assert np.ptp(np.array(gains)[:, 0]) > 0.01                                   # differs per photo


def test_writer_refuses_mismatched_inputs(tmp_path):
    mesh, photos, masks, views = _tiny_scene_inputs()
    with pytest.raises(ValueError, match="one entry per view"):
        synth.write_scene(tmp_path, mesh, photos[:2], masks, views, [False] * 3)
    with pytest.raises(ValueError, match="image_format"):
        synth.write_scene(tmp_path, mesh, photos, masks, views, [False] * 3, image_format="bmp")
