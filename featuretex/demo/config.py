"""Sizes of everything the demo generates: the full demo and a small variant for tests."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)


class DemoConfig:
    """Sizes of everything generated; `small()` gives a fast variant for tests."""

    n_views: int = 30
    width: int = 640
    height: int = 480
    focal: float = 900.0
    distance: float = 0.56
    elevations_deg: tuple[float, ...] = (8.0, 28.0, 50.0)
    texture: int = 2048
    true_theta: int = 180        # azimuth steps of the true body
    true_step: float = 0.0015    # max profile step outside (inside: / INNER_UV_WEIGHT)
    true_turn_deg: float = 8.0   # max turn of the profile per step
    handle_true: tuple[int, int] = (160, 36)
    scan_theta: int = 96
    scan_step: float = 0.0035
    scan_turn_deg: float = 25.0
    handle_scan: tuple[int, int] = (56, 16)
    atlas: int = 1024
    holdout_every: int = 5       # views k with k % holdout_every == 2 are held out
    exposure_jitter: float = 0.07
    white_balance_jitter: float = 0.025
    noise_sigma: float = 0.006
    pose_noise_deg: float = 0.15
    pose_noise_m: float = 0.0005
    light_seed: int = 3
    roughness: float = 0.32     # glaze: a mild sheen
    background: tuple[float, float, float] = (0.33, 0.33, 0.34)
    seed: int = 7

    @staticmethod
    def small() -> "DemoConfig":
        return DemoConfig(n_views=5, width=160, height=120, focal=225.0, texture=512, true_theta=64,
                          true_step=0.004, handle_true=(48, 12), scan_theta=40, scan_step=0.008,
                          handle_scan=(24, 8), atlas=256)
