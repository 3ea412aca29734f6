"""The scene's up direction estimated from the cameras, against the up the poses were built with
(synthetic rings of cameras looking at the object, turned by scipy's random rotations)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from featuretex import synth
from featuretex.scene.camera import Camera
from featuretex.scene.manifest import View
from featuretex.scene.up import estimate_up

CAM = Camera("c", "pinhole", 160, 120, 200.0, 200.0, 79.5, 59.5)


def _views(poses: list[np.ndarray], world_turn: np.ndarray | None = None) -> list[View]:
    """Views of `poses` in a world turned by `world_turn` ((3, 3); a point p becomes world_turn @ p)."""
    t = np.eye(4)
    if world_turn is not None:
        t[:3, :3] = world_turn
    return [View(f"v{i}", Path("x.png"), None, CAM, p @ np.linalg.inv(t)) for i, p in enumerate(poses)]


def _deg(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.degrees(np.arccos(np.clip(a @ b / np.linalg.norm(a) / np.linalg.norm(b), -1, 1))))


@pytest.mark.parametrize("elevations", [[20.0], [-25.0, 25.0], [10.0, 40.0, 70.0]], ids=["ring", "two", "dome"])
def test_up_of_camera_rings_in_the_scene_frame(elevations):
    up = estimate_up(_views(synth.orbit_poses(24, 3.0, elevations, seed=1)))
    assert up.estimated and np.allclose(up.vector, [0, 0, 1], atol=1e-9), up.detail


@pytest.mark.parametrize("seed", range(4))
def test_up_follows_a_turned_world(seed):
    turn = Rotation.random(random_state=seed).as_matrix()
    truth = turn @ [0.0, 0.0, 1.0]
    poses = synth.orbit_poses(30, 0.6, [15.0, 35.0], seed=seed)
    up = estimate_up(_views(poses, turn))
    assert _deg(up.vector, truth) < 0.5, up.detail


def test_up_of_a_single_tilted_ring_with_rolled_cameras():
    """One ring whose plane is tilted 3 degrees and cameras rolled by up to 10 degrees about their
    axis (hand-held): the plane normal wins, and 3 degrees from +z it snaps to +z."""
    rng = np.random.default_rng(5)
    tilt = Rotation.from_euler("x", 3.0, degrees=True).as_matrix()
    poses = []
    for p in synth.orbit_poses(20, 1.0, [25.0], seed=2):
        roll = np.eye(4)
        roll[:3, :3] = Rotation.from_euler("z", rng.uniform(-10, 10), degrees=True).as_matrix()
        poses.append(roll @ p)
    up = estimate_up(_views(poses, tilt))
    assert np.array_equal(up.vector, [0.0, 0.0, 1.0]) and "plane" in up.detail and "3.0 degrees" in up.detail
    up12 = estimate_up(_views(poses, Rotation.from_euler("x", 12.0, degrees=True).as_matrix()))
    assert _deg(up12.vector, tilt.T @ [0, 0, 1]) > 5 and _deg(up12.vector, Rotation.from_euler(
        "x", 12.0, degrees=True).as_matrix() @ [0, 0, 1]) < 0.5        # not snapped: 12 degrees off
