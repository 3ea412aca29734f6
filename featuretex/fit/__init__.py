"""The learned fit: sampler, losses, optimisation loop, checkpoints, and renders of the result."""

from featuretex.fit.config import FitConfig
from featuretex.fit.loop import FitResult, fit_scene
from featuretex.fit.render import (aligned_photo, render_decoder_residual, render_texel_head,
                                   render_view)

__all__ = ["FitConfig", "FitResult", "fit_scene", "render_view", "render_texel_head",
           "render_decoder_residual", "aligned_photo"]
