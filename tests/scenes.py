"""Small synthetic scenes for tests, made with featuretex.synth (rendered by pyrender)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image

from featuretex import synth
from featuretex.scene.camera import Camera


def smooth_texture(size: int = 256, seed: int = 0) -> Image.Image:
    """Band-limited colourful texture (sRGB bytes): sums of a few low-frequency sinusoids."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:size, 0:size] / size
    img = np.zeros((size, size, 3))
    for c in range(3):
        for _ in range(4):
            fx, fy = rng.integers(1, 6, 2)
            img[..., c] += np.sin(2 * np.pi * (fx * x + fy * y) + rng.uniform(0, 6.3))
    img = 0.5 + 0.12 * img
    return Image.fromarray(np.clip(img * 255, 0, 255).astype(np.uint8), "RGB")


def sphere_scene(folder: Path, *, texture: Image.Image, n_views: int = 12, size: tuple[int, int] = (160, 120),
                 holdout_every: int = 4, seed: int = 0, lit: bool = False) -> tuple[Path, np.ndarray]:
    """A unit-radius textured sphere photographed from two rings; exact geometry. Returns
    (scene.yaml path, the true texture as (T, T, 3) float32 sRGB values)."""
    mesh = synth.textured_sphere(1.0, texture, n_lat=32, n_lon=64)
    w, h = size
    cam = Camera("cam0", "pinhole", w, h, 1.1 * w, 1.1 * w, (w - 1) / 2, (h - 1) / 2)
    poses = synth.orbit_poses(n_views, 3.2, [-25.0, 25.0], seed=seed)
    views = [(f"v{k:03d}", cam, p) for k, p in enumerate(poses)]
    shots = synth.render_views(mesh, views, lit=lit, texture_filter="linear")
    holdout = [k % holdout_every == holdout_every - 1 for k in range(n_views)]
    path = synth.write_scene(folder, mesh, [s[0] for s in shots], [s[1] for s in shots], views, holdout,
                             image_format="png", seed=seed)
    return path, np.asarray(texture, np.float32) / 255.0
