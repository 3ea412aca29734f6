"""Every score in one place: image metrics (`metrics`), renders of a texture at a view (`render`),
held-out scores of the methods (`heldout`: `score_methods`, the entry point the score stage calls;
`score_method` and `score_bake`, which the touch-up and the benchmarks call too) and the
visibility of UV seams (`seams`)."""

from featuretex.lazy import lazy_exports

_EXPORTS = {"score_methods": "featuretex.scoring.heldout", "score_method": "featuretex.scoring.heldout",
            "score_bake": "featuretex.scoring.heldout", "render_texture": "featuretex.scoring.render",
            "seam_ratio": "featuretex.scoring.seams", "score_view": "featuretex.scoring.metrics",
            "aggregate": "featuretex.scoring.metrics"}
__all__ = list(_EXPORTS)
__getattr__ = lazy_exports(__name__, _EXPORTS)
