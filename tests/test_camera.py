"""Camera projection and Brown–Conrady distortion against OpenCV (cv2.projectPoints / undistortPoints)."""

import cv2
import numpy as np
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from featuretex.scene.camera import Camera


def random_camera(rng, model="brown", strength=1.0):
    dist = tuple(float(x) for x in rng.uniform(-1, 1, 5) * np.array([0.2, 0.05, 0.002, 0.002, 0.01]) * strength)
    return Camera("c", model, 1024, 768, float(rng.uniform(600, 1600)), float(rng.uniform(600, 1600)),
                  float(rng.uniform(480, 540)), float(rng.uniform(360, 400)), dist)


def test_project_matches_opencv():
    rng = np.random.default_rng(1)
    for _ in range(20):
        cam = random_camera(rng)
        pts = np.c_[rng.uniform(-0.4, 0.4, (500, 2)), rng.uniform(1, 3, 500)]
        ours = cam.project(pts)
        # reference: OpenCV projectPoints with identity pose, same K and (k1,k2,p1,p2,k3)
        ref, _ = cv2.projectPoints(pts, np.zeros(3), np.zeros(3), cam.K, np.array(cam.distortion))
        assert np.abs(ours - ref[:, 0]).max() < 1e-4


def test_unproject_matches_opencv_undistort():
    rng = np.random.default_rng(2)
    for _ in range(20):
        cam = random_camera(rng)
        px = np.c_[rng.uniform(0, cam.width - 1, 500), rng.uniform(0, cam.height - 1, 500)]
        ours = cam.unproject(px)[:, :2]
        # reference: cv2.undistortPoints with many iterations (its fixed-point loop) -> normalised coords
        crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 200, 1e-15)
        ref = cv2.undistortPoints(px[:, None], cam.K, np.array(cam.distortion), None, None, None, crit)[:, 0]
        # compare in pixels: normalised difference times focal length
        assert np.abs((ours - ref) * [cam.fx, cam.fy]).max() < 1e-4


def test_pinhole_ignores_distortion():
    cam = Camera("c", "pinhole", 640, 480, 500, 500, 319.5, 239.5, (0.3, 0.1, 0.01, 0.01, 0.1))
    p = np.array([[0.1, -0.2, 2.0]])
    assert np.allclose(cam.project(p), [[319.5 + 25.0, 239.5 - 50.0]])


@settings(max_examples=60, deadline=None)
@given(k1=st.floats(-0.3, 0.3), k2=st.floats(-0.08, 0.08), p1=st.floats(-0.003, 0.003),
       p2=st.floats(-0.003, 0.003), k3=st.floats(-0.02, 0.02), f=st.floats(400, 3000))
def test_round_trip_random_intrinsics(k1, k2, p1, p2, k3, f):
    """project(unproject(px)) == px within 1e-6 px over the image (tolerance: our Newton solve)."""
    cam = Camera("c", "brown", 800, 600, f, f * 1.01, 401.3, 297.8, (k1, k2, p1, p2, k3))
    # precondition of a real lens: radial mapping r -> r(1 + k1 r^2 + k2 r^4 + k3 r^6) stays monotonic
    # beyond the image corner (otherwise no inverse exists and no camera model can be unprojected)
    r = np.linspace(0, 1.3 * np.hypot(400, 300) / f, 200)
    assume(np.all(1 + 3 * k1 * r**2 + 5 * k2 * r**4 + 7 * k3 * r**6 > 0.3))
    ys, xs = np.mgrid[0:600:37, 0:800:41]
    px = np.c_[xs.ravel(), ys.ravel()].astype(float)
    rays = cam.unproject(px)
    back = cam.project(rays * 2.5)
    assert np.isfinite(back).all()
    assert np.abs(back - px).max() < 1e-6
