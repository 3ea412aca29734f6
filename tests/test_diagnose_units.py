"""Building blocks of the diagnosis against outside references: scikit-image's normalised
cross-correlation and block reduction, OpenCV's projection, CIELAB lightness, the solid angle of a
cone, and the pinhole relation between pixels and lengths."""

from __future__ import annotations

import math

import numpy as np
import pytest
import trimesh

from featuretex.diagnose.alignment import (ViewCorrection, alignment_evidence, field_at,
                                           projection_jacobian)
from featuretex.diagnose.classify import CAVITY, FINE, GEOMETRY, OFF, TEXTURE, UNCOVERED
from featuretex.diagnose.consistency import Samples, loo_ncc
from featuretex.diagnose.exposure import exposure
from featuretex.diagnose.grid import resample_to
from featuretex.diagnose.observe import Observation
from featuretex.diagnose.palette import COLOURS
from featuretex.diagnose.underfit import fit_progress
from featuretex.diagnose.verdict import length
from featuretex.scene.camera import Camera
from featuretex.scene.manifest import View
from featuretex.scene.mesh import SceneMesh, smooth_normals
from featuretex.synth import look_at


def test_two_view_ncc_matches_skimage_match_template():
    # with two views the leave-one-out mean of one view is the other view, so the score is the
    # plain zero-mean NCC of the two patches: scikit-image's match_template on equal-size arrays
    from skimage.feature import match_template

    rng = np.random.default_rng(0)
    D, P = 24, 5
    a = rng.uniform(0, 1, (D, D))
    b = 0.6 * a + 0.4 * rng.uniform(0, 1, (D, D)) + 0.1
    idx = np.arange(D * D)
    one = np.ones(D * D)
    score, _ = loo_ncc([Samples(idx, a.ravel(), one), Samples(idx, b.ravel(), one)], D, patch=P,
                       min_fill=0.99, min_contrast=1e-3)
    for r, c in [(5, 5), (12, 7), (18, 19)]:
        pa, pb = a[r - 2:r + 3, c - 2:c + 3], b[r - 2:r + 3, c - 2:c + 3]
        ref = match_template(pa, pb)[0, 0]
        assert score[r * D + c] == pytest.approx(ref, abs=1e-4)


def test_projection_jacobian_matches_opencv_finite_differences():
    import cv2

    rng = np.random.default_rng(1)
    R = cv2.Rodrigues(np.array([0.3, -0.2, 0.1]))[0]
    t = np.array([0.1, -0.2, 3.0])
    K = np.array([[500.0, 0, 320], [0, 480.0, 240], [0, 0, 1]])
    X = rng.uniform(-0.5, 0.5, (6, 3))
    J = projection_jacobian(R, X @ R.T + t, K[0, 0], K[1, 1])
    h = 1e-6
    rvec = cv2.Rodrigues(R)[0]
    for i in range(3):
        e = np.zeros(3)
        e[i] = h
        up = cv2.projectPoints(X + e, rvec, t, K, None)[0][:, 0]
        dn = cv2.projectPoints(X - e, rvec, t, K, None)[0][:, 0]
        assert np.allclose(J[:, :, i], (up - dn) / (2 * h), rtol=1e-5, atol=1e-4)


def test_block_resampling_matches_skimage_block_reduce():
    from skimage.measure import block_reduce

    rng = np.random.default_rng(2)
    f = rng.normal(size=(64, 64)).astype(np.float32)
    valid = np.ones((64, 64), bool)
    out = resample_to(f, valid, np.ones((16, 16), bool))
    assert np.allclose(out, block_reduce(f, (4, 4), np.mean), atol=1e-6)
    mx = resample_to(f, valid, np.ones((16, 16), bool), mode="max")
    assert np.allclose(mx, block_reduce(f, (4, 4), np.max))
    # finer destination: every texel takes its source cell (nearest-neighbour upsampling)
    up = resample_to(f, valid, np.ones((128, 128), bool))
    assert np.array_equal(up, np.repeat(np.repeat(f, 2, 0), 2, 1))


def test_class_colours_differ_in_lightness():
    # CIELAB L* by scikit-image: lightness survives every colour-vision deficiency and greyscale
    from skimage.color import rgb2lab

    L = {c: rgb2lab(np.array(rgb, float)[None, None] / 255.0)[0, 0, 0] for c, rgb in COLOURS.items()}
    order = [OFF, FINE, GEOMETRY, TEXTURE, CAVITY, UNCOVERED]
    steps = np.diff([L[c] for c in order])
    assert np.all(steps < -12), {c: round(L[c], 1) for c in order}


def test_cavities_are_their_own_class_and_the_least_severe_problem():
    from skimage.measure import block_reduce

    from featuretex.diagnose.classify import area_fractions, classify, from_severity, severity

    valid = np.array([[True, True, True, True, False]])
    coverage = np.array([[0, 1, 0, 5, np.nan]], np.float32)
    geometry = np.array([[0, 0, 0, 0.9, np.nan]], np.float32)
    hidden = np.array([[True, False, False, True, False]])
    cls = classify(valid, coverage, geometry, np.zeros_like(geometry), min_views=2, min_region=1, hidden=hidden)
    # too few views + in a cavity -> cavity; too few views outside -> uncovered; well seen -> its own class
    assert cls.tolist() == [[CAVITY, UNCOVERED, UNCOVERED, GEOMETRY, OFF]]
    a = area_fractions(cls, np.array([[1.0, 2.0, 3.0, 4.0, 0.0]]))
    assert a == pytest.approx({"uncovered": 0.6, "uncovered_hidden": 0.1, "geometry_limited": 0.4,
                               "texture_limited": 0.0})
    # pooling keeps the most severe class: any problem outranks a cavity, a cavity outranks fine
    blocks = np.array([[CAVITY, FINE, CAVITY, TEXTURE, UNCOVERED, CAVITY, OFF, FINE]], np.uint8)
    pooled = from_severity(block_reduce(severity(blocks), (1, 2), np.max))   # scikit-image pools
    assert pooled.tolist() == [[CAVITY, TEXTURE, UNCOVERED, FINE]]


def test_exposure_at_bottom_of_a_tube_is_the_cone_solid_angle():
    # a point at the centre of a closed bottom of a tube (radius r, height h) escapes only through
    # the opening: a cone of half-angle atan(r / h), i.e. a share 1 - cos(theta) of the hemisphere
    # (solid angle of a cone 2 pi (1 - cos theta) over the hemisphere's 2 pi)
    r, h = 1.0, 3.0
    tube = trimesh.creation.cylinder(radius=r, height=h, sections=128)
    tube.apply_translation([0, 0, h / 2])
    top = tube.triangles_center[:, 2] > h - 1e-6
    tube.update_faces(~top)
    v, f = np.asarray(tube.vertices), np.asarray(tube.faces)
    mesh = SceneMesh(v, f, np.zeros((len(v), 2)), smooth_normals(v, f))
    e = exposure(mesh, np.array([[0.0, 0.0, 1e-3]]), np.array([[0.0, 0.0, 1.0]]), rays=2048)
    expect = 1.0 - math.cos(math.atan(r / h))
    assert e[0] == pytest.approx(expect, abs=0.01)
    # the outside of the bottom, facing down, is open to its whole hemisphere
    assert exposure(mesh, np.array([[0.0, 0.0, -1e-3]]), np.array([[0.0, 0.0, -1.0]]), rays=256)[0] > 0.99


def _view(name: str, eye, target=(0.0, 0.0, 0.0)) -> View:
    cam = Camera("c", "pinhole", 200, 150, 180.0, 180.0, 99.5, 74.5)
    return View(name=name, image=None, mask=None, camera=cam, world_to_camera=look_at(eye, target))


def _observation(view: View, pos: np.ndarray, field: np.ndarray) -> Observation:
    pc = view.to_camera(pos)
    z = np.zeros((view.camera.height, view.camera.width), np.float32)
    return Observation(view=view, seen=np.arange(len(pos)), idx=np.arange(len(pos)),
                       xy=view.camera.project(pc), cos=np.ones(len(pos), np.float32), depth=pc[:, 2],
                       colour=np.zeros(z.shape + (3,), np.float32), grey=z,
                       correction=ViewCorrection(np.eye(3, dtype=np.float32), np.zeros(3, np.float32), field))


def test_uniform_field_converts_to_length_by_the_pinhole_relation():
    # lateral size = pixels x depth / focal length (similar triangles of the pinhole camera)
    view = _view("a", (0.0, 0.0, 4.0))
    pos = np.array([[0.0, 0.0, 0.0], [0.3, -0.2, 0.0]])
    nrm = np.tile([0.0, 0.0, 1.0], (2, 1))
    field = np.broadcast_to(np.array([3.0, 4.0], np.float32), (5, 6, 2)).copy()   # 5 px everywhere
    ev = alignment_evidence([_observation(view, pos, field)], pos, nrm, 2, remove_global=False, ridge=0.1)
    assert ev.misplacement == pytest.approx(5.0 * 4.0 / 180.0, rel=1e-5)
    ev = alignment_evidence([_observation(view, pos, field)], pos, nrm, 2, remove_global=True, ridge=0.1)
    assert ev.global_px["a"] == pytest.approx(5.0) and np.allclose(ev.misplacement, 0, atol=1e-6)


def test_fields_of_an_offset_surface_give_its_offset():
    # fields made by OpenCV's projectPoints for a surface lying t along the normal: d = pi(p + t n) - pi(p)
    import cv2

    t_true = 0.05
    eyes = [(3.0, 0.0, 2.0), (-2.0, 2.5, 2.0), (0.0, -3.0, 2.5), (0.5, 0.5, 3.5)]
    pos = np.array([[x, y, 0.0] for x in (-0.2, 0.0, 0.2) for y in (-0.2, 0.1)])
    nrm = np.tile([0.0, 0.0, 1.0], (len(pos), 1))
    obs = []
    for k, eye in enumerate(eyes):
        view = _view(f"v{k}", eye)
        cam = view.camera
        rvec = cv2.Rodrigues(view.R)[0]
        gy, gx = np.meshgrid(np.linspace(0, cam.height - 1, 31), np.linspace(0, cam.width - 1, 41), indexing="ij")
        px = np.stack([gx.ravel(), gy.ravel()], 1)
        # the plane z = 0 seen at each node pixel, and its photographed copy at z = t_true
        d = cam.unproject(px) @ view.R
        s = -view.centre[2] / d[:, 2]
        p = view.centre + s[:, None] * d
        moved = cv2.projectPoints(p + [0.0, 0.0, t_true], rvec, view.t, cam.K, None)[0][:, 0]
        field = (moved - px).reshape(31, 41, 2).astype(np.float32)
        obs.append(_observation(view, pos, field))
    ev = alignment_evidence(obs, pos, nrm, len(pos), remove_global=False, ridge=0.0)
    assert np.allclose(ev.offset, t_true, rtol=0.03)


def test_fit_progress_reads_a_falling_and_a_settled_loss():
    steps = np.arange(0, 800, 10)
    falling = {"train": {"step": steps.tolist(), "loss": (0.1 + 0.1 * np.exp(-steps / 600)).tolist()}}
    settled = [{"step": int(s), "loss": float(0.1 + 0.1 * np.exp(-s / 40))} for s in steps]
    f, s = fit_progress(falling, 0.25), fit_progress(settled, 0.25)
    assert f.known and s.known and f.steps == 790
    # relative drop of 0.1 + 0.1 exp(-s/600) from ~step 590 to 790 (the definition; windows of medians)
    expect = (0.1 * (np.exp(-570 / 600) - np.exp(-770 / 600))) / (0.1 + 0.1 * np.exp(-770 / 600))
    assert f.tail_drop == pytest.approx(expect, rel=0.2)
    assert s.tail_drop < 1e-3
    assert not fit_progress(None, 0.25).known


@pytest.mark.parametrize("value, unit, unit_m, text", [
    (0.0021, "meter", 1.0, "2.1 mm"), (0.034, "meter", 1.0, "3.4 cm"), (2.5, "millimeter", 0.001, "2.5 mm"),
    (1.5, "meter", 1.0, "1.50 m"), (0.08, "inch", 0.0254, "0.08 inch")])
def test_lengths_carry_their_unit(value, unit, unit_m, text):
    assert length(value, unit, unit_m) == text


def test_field_lookup_spans_pixel_centres():
    # nodes at pixel centres 0 and W-1 (align_corners): the corner nodes are read exactly there
    f = np.zeros((2, 2, 2), np.float32)
    f[0, 1] = (1.0, 2.0)
    got = field_at(f, np.array([[199.0, 0.0], [0.0, 0.0], [99.5, 0.0]]), 200, 150)
    assert np.allclose(got, [[1.0, 2.0], [0.0, 0.0], [0.5, 1.0]])
