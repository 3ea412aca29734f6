"""The learned fit: sampler, losses, optimisation loop, its state and files, checkpoints, FLOP
accounting, clean stopping, and renders of the result."""

from featuretex.lazy import lazy_exports

_EXPORTS = {"FitConfig": "featuretex.fit.config", "FitResult": "featuretex.fit.outputs",
            "fit_scene": "featuretex.fit.loop",
            "render_view": "featuretex.fit.render", "render_texel_head": "featuretex.fit.render",
            "render_decoder_residual": "featuretex.fit.render", "residual_renderer": "featuretex.fit.render",
            "aligned_photo": "featuretex.fit.render"}
__all__ = list(_EXPORTS)
__getattr__ = lazy_exports(__name__, _EXPORTS)
