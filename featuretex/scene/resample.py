"""Working images: a photo cropped to a box and reduced by an area filter in linear light, and the
camera that sees the reduced image exactly.

Pixel-centre convention (pixel (0, 0) is the centre of the top-left pixel): an area filter that
turns the crop's n pixels along an axis into m makes working pixel i the mean of the photo over
[x0 + i s, x0 + (i + 1) s) in pixel-edge coordinates, s = n / m, so photo coordinate x maps to

    x' = (x - x0 + 0.5) / s - 0.5,   hence  fx' = fx / s,  cx' = (cx - x0 + 0.5) / s - 0.5.

Lens distortion acts on normalised image coordinates, before the intrinsic matrix, so its
coefficients stay as they are.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from featuretex.scene.camera import Camera
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.images import linear_table

WORKING_LEVELS = np.uint16  # code values of a reduced photo: 16-bit sRGB keeps the filter's result within 1e-5


@dataclass(frozen=True)
class Window:
    """Where a working image comes from: the crop box of the photo and the size it is reduced to."""

    x0: int      # crop box, photo pixels: columns [x0, x1), rows [y0, y1)
    y0: int
    x1: int
    y1: int
    width: int   # working image size, pixels (<= the box's)
    height: int

    def __post_init__(self) -> None:
        if not (0 < self.width <= self.x1 - self.x0 and 0 < self.height <= self.y1 - self.y0):
            raise ValueError(f"working size {self.width}x{self.height} does not fit the crop box {self.box}")

    @property
    def box(self) -> list[int]:
        """[x0, y0, x1, y1], photo pixels, half-open."""
        return [self.x0, self.y0, self.x1, self.y1]

    @property
    def factors(self) -> tuple[float, float]:
        """(sx, sy) photo pixels per working pixel along each axis (>= 1)."""
        return (self.x1 - self.x0) / self.width, (self.y1 - self.y0) / self.height

    @property
    def reduced(self) -> bool:
        return (self.width, self.height) != (self.x1 - self.x0, self.y1 - self.y0)

    def to_working(self, px: np.ndarray) -> np.ndarray:
        """(N, 2) photo pixel coords (x, y) -> (N, 2) working pixel coords."""
        sx, sy = self.factors
        px = np.asarray(px, np.float64)
        return np.stack([(px[:, 0] - self.x0 + 0.5) / sx - 0.5, (px[:, 1] - self.y0 + 0.5) / sy - 0.5], axis=1)


def reduced_size(box: tuple[int, int, int, int], factor: float) -> tuple[int, int]:
    """(width, height) of the crop box [x0, y0, x1, y1] reduced by `factor` >= 1 (at least 1 pixel)."""
    w, h = box[2] - box[0], box[3] - box[1]
    if factor <= 1.0:
        return w, h
    return max(1, min(w, round(w / factor))), max(1, min(h, round(h / factor)))


def working_camera(cam: Camera, win: Window) -> Camera:
    """The intrinsics of the working image `win` of a photo taken with `cam` (same id and distortion)."""
    sx, sy = win.factors
    return dataclasses.replace(cam, width=win.width, height=win.height, fx=cam.fx / sx, fy=cam.fy / sy,
                               cx=(cam.cx - win.x0 + 0.5) / sx - 0.5, cy=(cam.cy - win.y0 + 0.5) / sy - 0.5)


def _area_reduce(a: np.ndarray, win: Window) -> np.ndarray:
    """(h, w, C) or (h, w) float32 crop -> the working size by cv2's area filter (exact pixel-area
    weights, also for factors that are not whole numbers)."""
    import cv2

    return cv2.resize(a, (win.width, win.height), interpolation=cv2.INTER_AREA)


def reduce_levels(levels: np.ndarray, win: Window) -> np.ndarray:
    """(H, W, 3) uint8/uint16 sRGB code values of the whole photo -> the working image's code values.

    Cropped only: the same dtype, the same values. Reduced: averaged in linear light (IEC 61966-2-1
    decoding by table), then encoded again as 16-bit sRGB code values.
    """
    crop = levels[win.y0:win.y1, win.x0:win.x1]
    if not win.reduced:
        return np.ascontiguousarray(crop)
    lin = _area_reduce(linear_table(crop.dtype.name)[crop], win)
    top = np.iinfo(WORKING_LEVELS).max
    return np.rint(linear_to_srgb(np.clip(lin, 0.0, 1.0)) * top).astype(WORKING_LEVELS)


def reduce_mask(mask: np.ndarray, win: Window) -> np.ndarray:
    """(H, W) bool mask of the whole photo -> (height, width) bool: the object's share of each working
    pixel (area average) >= 0.5, so the mask stays centred on the photo it belongs to."""
    crop = mask[win.y0:win.y1, win.x0:win.x1]
    if not win.reduced:
        return np.ascontiguousarray(crop)
    return _area_reduce(crop.astype(np.float32), win) >= 0.5
