"""Photo and mask decoding: 8/16-bit PNG, JPEG (EXIF orientation honoured), TIFF -> linear light."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

from featuretex.errors import input_error
from featuretex.scene.colour import srgb_to_linear


def _open(path: Path, manifest_file: str, view: str, fld: str) -> Image.Image:
    try:
        im = Image.open(path)
        im.load()
    except (UnidentifiedImageError, OSError, ValueError) as e:
        raise input_error(manifest_file, f"cannot decode '{path.name}': {e}", view=view, field=fld) from None
    return ImageOps.exif_transpose(im)


def _to_unit_float(im: Image.Image) -> np.ndarray:
    """Any Pillow image -> (H, W, C) float32 in [0, 1], keeping 16-bit precision where present."""
    if im.mode in ("I;16", "I;16B", "I;16L", "I;16N"):
        return (np.asarray(im, dtype=np.uint16).astype(np.float32) / 65535.0)[..., None]
    if im.mode == "I":
        a = np.asarray(im, dtype=np.int64)
        scale = 65535.0 if a.max(initial=0) > 255 else 255.0
        return (np.clip(a, 0, scale).astype(np.float32) / scale)[..., None]
    if im.mode == "F":
        return np.clip(np.asarray(im, dtype=np.float32), 0, 1)[..., None]
    if im.mode in ("P", "PA", "CMYK", "YCbCr", "LAB", "HSV", "1"):
        im = im.convert("RGBA" if "transparency" in im.info or im.mode == "PA" else "RGB")
    a = np.asarray(im, dtype=np.float32) / 255.0
    return a[..., None] if a.ndim == 2 else a


def load_photo(path: Path, manifest_file: str, view: str, size: tuple[int, int]) -> np.ndarray:
    """Decode a photo to (H, W, 3) float32 linear light. `size` = (width, height) expected."""
    a = _to_unit_float(_open(path, manifest_file, view, "image"))
    if a.shape[1] != size[0] or a.shape[0] != size[1]:
        raise input_error(manifest_file, f"'{path.name}' is {a.shape[1]}x{a.shape[0]}, camera says "
                          f"{size[0]}x{size[1]}", view=view, field="image")
    if a.shape[2] in (1, 2):      # grey (+alpha): replicate
        a = np.repeat(a[..., :1], 3, axis=2)
    return srgb_to_linear(a[..., :3])


def load_mask(path: Path | None, manifest_file: str, view: str, size: tuple[int, int]) -> np.ndarray | None:
    """Decode a mask to (H, W) bool, white (>= 0.5) = object. None when the view has none."""
    if path is None:
        return None
    a = _to_unit_float(_open(path, manifest_file, view, "mask"))
    if a.shape[1] != size[0] or a.shape[0] != size[1]:
        raise input_error(manifest_file, f"mask '{path.name}' is {a.shape[1]}x{a.shape[0]}, camera says "
                          f"{size[0]}x{size[1]}", view=view, field="mask")
    if a.shape[2] in (2, 4):       # an alpha channel, when present, is the mask
        return a[..., -1] >= 0.5
    return a[..., :3].mean(axis=2) >= 0.5
