"""The scene's up direction: given in scene.yaml, or estimated from the cameras.

Object captures circle the object about its up axis (a turntable, or a photographer walking
round it), and photographers hold the camera roughly upright. So the estimate is the normal of the
best-fit plane through the camera centres, turned to agree with the cameras' own up direction
(image -y); where the centres do not lie on a plane (a dome of views, a line of views) the
cameras' mean up direction stands alone.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from featuretex.scene.manifest import Manifest, View

# the centres lie on a plane when its normal's spread is this fraction of the narrower in-plane one
FLAT = 0.5
# the plane's normal is taken only this close (degrees) to the cameras' mean up direction
AGREE_DEG = 30.0
# an estimate this close (degrees) to a scene axis becomes that axis: scene frames are usually
# axis-aligned and a capture ring is rarely exactly level (common practice)
SNAP_DEG = 5.0


@dataclass(frozen=True)
class UpAxis:
    """The scene's up direction and where it came from."""

    vector: np.ndarray     # (3,) float64 unit vector, scene frame
    estimated: bool        # False: given in scene.yaml
    detail: str            # one plain sentence saying how it was found

    def as_list(self) -> list[float]:
        return [round(float(x), 6) + 0.0 for x in self.vector]


def _unit(v: np.ndarray) -> np.ndarray:
    return v / max(float(np.linalg.norm(v)), 1e-300)


def _angle_deg(a: np.ndarray, b: np.ndarray) -> float:
    return math.degrees(math.acos(float(np.clip(_unit(a) @ _unit(b), -1.0, 1.0))))


def _text(v: np.ndarray) -> str:
    return "[" + ", ".join(f"{x:.3g}" for x in np.where(np.abs(v) < 5e-4, 0.0, v) + 0.0) + "]"


def _snap(v: np.ndarray) -> tuple[np.ndarray, float | None]:
    """The nearest signed scene axis when within SNAP_DEG of `v`; else `v` itself (angle None)."""
    k = int(np.argmax(np.abs(v)))
    axis = np.zeros(3)
    axis[k] = math.copysign(1.0, v[k])
    off = _angle_deg(v, axis)
    return (axis, off) if off <= SNAP_DEG else (v, None)


def estimate_up(views: Sequence[View]) -> UpAxis:
    """Up from the cameras (see the module doc)."""
    centres = np.stack([v.centre for v in views])                          # (N, 3) scene units
    cam_up = np.stack([-v.R[1] for v in views])                            # (N, 3) image -y in world
    mean_up = cam_up.mean(axis=0)
    agreement = float(np.linalg.norm(mean_up))                             # 1 = all cameras alike
    how = ""
    vec = None
    if len(views) >= 3:
        _, s, vt = np.linalg.svd(centres - centres.mean(axis=0))
        normal = vt[2] if float(vt[2] @ mean_up) >= 0 else -vt[2]
        if s[1] > 0 and s[2] <= FLAT * s[1] and (agreement < 1e-6 or _angle_deg(normal, mean_up) <= AGREE_DEG):
            vec = normal
            how = (f"normal of the plane through the {len(views)} camera centres (they circle the object), "
                   f"turned to agree with the cameras' upright direction")
    if vec is None:
        if agreement < 1e-6:
            return UpAxis(np.array([0.0, 1.0, 0.0]), True, "the cameras give no up direction; "
                          "the scene's +Y is taken as up (set 'up' in scene.yaml)")
        vec = mean_up
        how = f"mean upright direction of the {len(views)} cameras (their centres do not lie on one ring)"
    vec = _unit(vec)
    snapped, off = _snap(vec)
    if off is not None and off > 0:
        how += f", {off:.1f} degrees from the scene axis {_text(snapped)}, taken as that axis"
    return UpAxis(snapped, True, f"up {_text(snapped)} estimated as the {how}")


def scene_up(manifest: Manifest) -> UpAxis:
    """The `up` of scene.yaml when given, else the estimate from the cameras."""
    if manifest.up is not None:
        return UpAxis(_unit(np.asarray(manifest.up, np.float64)), False, f"up {_text(_unit(manifest.up))} "
                      "as given in scene.yaml")
    return estimate_up(manifest.views)
