"""Diagnosis: per-texel error map separating geometry error, texture under-fit and unseen surface,
and a verdict per scan (rescan, fix-geometry, refine-texture, ready)."""

from featuretex.diagnose.config import DiagnoseConfig
from featuretex.diagnose.core import Diagnosis, diagnose
from featuretex.diagnose.outputs import write_outputs

__all__ = ["DiagnoseConfig", "Diagnosis", "diagnose", "write_outputs"]
