"""Every knob of the geometry touch-up (`touchup=true` switches the stage on). Lengths are a fraction
of the object size (the diagonal of the mesh's bounding box) unless a `*_units` override in scene
units is set (> 0)."""

from __future__ import annotations

from dataclasses import dataclass

from featuretex.settings import setting


@dataclass
class TouchupConfig:
    rounds: int = setting(2, ge=1, le=10)       # at most this many rounds of move -> re-fit -> re-bake -> re-diagnose
    fit_steps: int = setting(200, ge=0)         # steps of each round's re-fit, warm-started from the current model
    rebake_at: int = setting(150, ge=0)         # the re-fit re-averages its colour layer after this step (0 = never)
    smooth_fraction: float = setting(0.006, gt=0, le=1)  # smoothing length of the offsets (membrane prior), fraction of size
    smooth_units: float = setting(0.0, ge=0)
    laplacian: str = setting("cotangent", choices=("cotangent", "uniform"))  # cotangent (integral |grad|^2) or uniform
    margin_fraction: float = setting(0.02, ge=0, le=1)  # surface around geometry-limited regions that may move too
    margin_units: float = setting(0.0, ge=0)
    fine_weight: float = setting(0.5, ge=0)     # weight of the zero-offset evidence of fine texels in that margin
    robust_fraction: float = setting(0.002, gt=0, le=1)  # Cauchy scale of the evidence residuals, fraction of size
    min_gain_db: float = setting(0.05)          # a round is kept when the fitted views' leave-one-out error over
                                                # the surface that may move falls by this many dB

    def relations(self):
        if self.rebake_at > self.fit_steps:
            yield "rebake_at", f"must be at most touchup_settings.fit_steps ({self.fit_steps}), or 0"
