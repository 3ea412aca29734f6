"""Diagnosis: per-texel error map separating geometry error, texture under-fit and unseen surface,
and a verdict per scan (rescan, fix-geometry, refine-texture, ready)."""

from featuretex.lazy import lazy_exports

_EXPORTS = {"DiagnoseConfig": "featuretex.diagnose.config", "Diagnosis": "featuretex.diagnose.core",
            "diagnose": "featuretex.diagnose.core", "write_outputs": "featuretex.diagnose.outputs"}
__all__ = list(_EXPORTS)
__getattr__ = lazy_exports(__name__, _EXPORTS)
