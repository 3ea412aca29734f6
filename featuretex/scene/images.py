"""Photo and mask decoding: 8/16-bit PNG, JPEG (EXIF orientation honoured), TIFF, HEIC, camera RAW
-> linear light.

What is accepted, and how (every other kind of file is refused with an InputError):

| file                          | photo                       | mask                         |
| ----------------------------- | --------------------------- | ---------------------------- |
| 8-bit RGB, grey, palette, 1-bit | decoded (grey replicated) | mean of the channels >= 0.5  |
| 16-bit RGB / grey PNG or TIFF | decoded at full depth (OpenCV; Pillow keeps only 8 bits of 16-bit RGB) | as above |
| with alpha (RGBA, LA, palette transparency) | alpha ignored | alpha >= 0.5 is the mask   |
| EXIF orientation 2..8         | turned upright first        | turned upright first         |
| HEIC / HEIF (through pillow-heif) | decoded at 8 bits, upright as stored | as 8-bit above       |
| camera RAW (by extension: RAW_SUFFIXES; through rawpy/LibRaw) | demosaiced, linear (see `_raw_levels`) | refused |
| CMYK, Lab, HSV, 32-bit int / float | refused: not an sRGB-encoded photo               ||

Pixel values of ordinary images are read as sRGB-encoded; photos are decoded to linear light with
the IEC 61966-2-1 curve. A RAW photo is linear already: it is carried as 16-bit sRGB code values
like any other photo, so every stage reads every photo the same way.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from functools import lru_cache
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

from featuretex.errors import input_error
from featuretex.scene.colour import linear_to_srgb, srgb_to_linear

# Pillow modes of 8-bit data (after opening) and the mode each is converted to
_EIGHT_BIT = {"L": "L", "LA": "LA", "RGB": "RGB", "RGBA": "RGBA", "1": "L", "P": None, "PA": "RGBA",
              "La": "LA", "RGBa": "RGBA"}
_SIXTEEN_BIT_GREY = ("I;16", "I;16B", "I;16L", "I;16N")
_REFUSED = {"CMYK": "CMYK ink separations carry no sRGB colour; export the photo as RGB",
            "LAB": "Lab images are not sRGB-encoded; export the photo as RGB",
            "HSV": "HSV images are not sRGB-encoded; export the photo as RGB",
            "YCbCr": "raw YCbCr images are not supported; export the photo as RGB",
            "I": "32-bit integer images are not sRGB-encoded photos; use 8 or 16 bits per channel",
            "F": "floating-point images are not sRGB-encoded photos; use 8 or 16 bits per channel"}
_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
# EXIF orientation (tag 0x0112) -> transform that makes the stored pixels upright (EXIF 2.3 §4.6.4)
_ORIENT = {
    1: lambda a: a,
    2: lambda a: a[:, ::-1],                          # mirrored left-right
    3: lambda a: a[::-1, ::-1],                       # rotated 180
    4: lambda a: a[::-1],                             # mirrored top-bottom
    5: lambda a: a.swapaxes(0, 1),                    # transposed
    6: lambda a: np.rot90(a, -1),                     # needs 90 clockwise
    7: lambda a: a.swapaxes(0, 1)[::-1, ::-1],        # transversed
    8: lambda a: np.rot90(a, 1),                      # needs 90 counter-clockwise
}
SWAPS_AXES = (5, 6, 7, 8)  # orientations whose upright image has width and height exchanged
# camera RAW files, told apart by extension (a DNG is also a TIFF: Pillow would read its preview)
RAW_SUFFIXES = frozenset({".dng", ".cr2", ".cr3", ".crw", ".nef", ".nrw", ".arw", ".srf", ".sr2", ".raf",
                          ".orf", ".rw2", ".pef", ".srw", ".x3f", ".3fr", ".fff", ".iiq", ".rwl", ".erf",
                          ".kdc", ".dcr", ".mrw", ".mos", ".mef"})
FORMATS_HINT = "use PNG, JPEG, TIFF, HEIC or a camera RAW file"


def _fail(manifest_file: str, view: str, fld: str, path: Path, what: str, hint: str | None = None):
    return input_error(manifest_file, f"'{path.name}': {what}", view=view, field=fld, hint=hint)


def is_raw(path: Path) -> bool:
    return path.suffix.lower() in RAW_SUFFIXES


@lru_cache(maxsize=1)
def _heif_opener() -> None:
    """Teach Pillow to open HEIC/HEIF files (once per process)."""
    import pillow_heif

    pillow_heif.register_heif_opener()


@lru_cache(maxsize=1)
def _srgb16_table() -> np.ndarray:
    """16-bit linear level -> 16-bit sRGB code value (IEC 61966-2-1), for every level."""
    lin = np.arange(65536, dtype=np.float64) / 65535.0
    return np.rint(linear_to_srgb(lin) * 65535.0).astype(np.uint16)


def _raw_file(path: Path, manifest_file: str, view: str, fld: str):
    """rawpy's handle on a camera RAW file, its raw data unpacked (damage shows here)."""
    import rawpy

    if fld != "image":
        raise _fail(manifest_file, view, fld, path, "a camera RAW file cannot be a mask",
                    hint="save the mask as a PNG (white = object)")
    raw = None
    try:
        raw = rawpy.imread(str(path))
        raw.raw_image  # noqa: B018 (unpacks the sensor data)
    except (rawpy.LibRawError, OSError, ValueError) as e:
        if raw is not None:
            raw.close()
        raise _fail(manifest_file, view, fld, path, f"cannot decode this camera RAW file ({type(e).__name__}: {e})",
                    hint="the file is damaged, truncated or from a camera LibRaw does not know") from None
    return raw


def _raw_size(path: Path, manifest_file: str, view: str, fld: str) -> tuple[int, int]:
    """(width, height) of the developed, upright RAW photo."""
    with _raw_file(path, manifest_file, view, fld) as raw:
        s = raw.sizes
        return (s.height, s.width) if s.flip in (5, 6) else (s.width, s.height)


def _raw_levels(path: Path, manifest_file: str, view: str, fld: str) -> np.ndarray:
    """Camera RAW -> (H, W, 3) uint16 sRGB code values of the linear photo.

    LibRaw demosaics (its default AHD), applies the camera's white balance as shot and its colour
    matrix to linear sRGB primaries, with no brightening and no tone curve (gamma 1), upright by
    the file's orientation. The linear 16-bit result is sRGB-encoded at 16 bits by a table, so
    `linear_table` gives back the linear values within 16-bit quantisation.
    """
    import rawpy

    with _raw_file(path, manifest_file, view, fld) as raw:
        try:
            lin16 = raw.postprocess(use_camera_wb=True, no_auto_bright=True, gamma=(1, 1), output_bps=16,
                                    output_color=rawpy.ColorSpace.sRGB)
        except (rawpy.LibRawError, OSError, ValueError) as e:
            raise _fail(manifest_file, view, fld, path, f"cannot develop this camera RAW file ({e})") from None
    return _srgb16_table()[lin16]


def _orientation(im: Image.Image) -> int:
    """EXIF orientation of an image whose pixels are loaded already: for a PNG, Pillow reads an
    eXIf chunk after the pixel data by loading the pixels, and damage found there must not be
    taken for a corrupt EXIF block."""
    try:
        o = int(im.getexif().get(0x0112, 1))
    except Exception:  # a corrupt EXIF block is not worth refusing the photo over: take it as upright
        return 1
    return o if o in _ORIENT else 1


def _bits_per_sample(im: Image.Image, path: Path) -> int:
    """Stored bits per channel, read from the file itself (Pillow reports 16-bit RGB as 8-bit 'RGB')."""
    if im.format == "PNG":
        with open(path, "rb") as f:
            head = f.read(26)
        # PNG spec §11.2.2: IHDR is the first chunk; its bit depth byte sits at file offset 24
        if head[:8] == _PNG_SIGNATURE and head[12:16] == b"IHDR":
            return int(head[24])
    if im.format == "TIFF":
        bps = getattr(im, "tag_v2", {}).get(258, 8)   # TIFF 6.0 tag 258 BitsPerSample
        return int(max(bps) if isinstance(bps, (tuple, list)) else bps)
    return 16 if im.mode in _SIXTEEN_BIT_GREY else 8


def _decode_wide(path: Path, manifest_file: str, view: str, fld: str) -> np.ndarray:
    """16-bit PNG / TIFF through OpenCV at full depth -> (H, W, C) uint16, RGB(A) order."""
    import cv2

    a = cv2.imdecode(np.fromfile(path, dtype=np.uint8), cv2.IMREAD_UNCHANGED)
    if a is None or a.dtype != np.uint16:
        raise _fail(manifest_file, view, fld, path, "cannot decode this 16-bit image (damaged or truncated?)")
    if a.ndim == 2:
        a = a[..., None]
    elif a.shape[2] == 3:
        a = a[..., ::-1]                        # OpenCV stores BGR
    elif a.shape[2] == 4:
        a = a[..., [2, 1, 0, 3]]                # BGRA -> RGBA
    return a


def _open(path: Path, manifest_file: str, view: str, fld: str) -> tuple[Image.Image, bool]:
    """Open and vet a file: (Pillow image, needs the 16-bit decoder)."""
    _heif_opener()
    try:
        im = Image.open(path)
    except (UnidentifiedImageError, OSError, ValueError, Image.DecompressionBombError) as e:
        raise _fail(manifest_file, view, fld, path, f"not an image file this tool can read ({e})",
                    hint=FORMATS_HINT) from None
    if im.mode in _REFUSED:
        im.close()
        kind = {"I": "32-bit integer", "F": "floating-point"}.get(im.mode, im.mode)
        raise _fail(manifest_file, view, fld, path, f"{kind} image refused", hint=_REFUSED[im.mode])
    wide = im.format in ("PNG", "TIFF") and _bits_per_sample(im, path) > 8
    if not wide and im.mode not in _EIGHT_BIT and im.mode not in _SIXTEEN_BIT_GREY:
        im.close()
        raise _fail(manifest_file, view, fld, path, f"unsupported pixel format {im.mode!r}",
                    hint="save it as 8 or 16-bit RGB or grey PNG, JPEG or TIFF")
    return im, wide


def _load(im: Image.Image, path: Path, manifest_file: str, view: str, fld: str) -> None:
    try:
        im.load()  # also for 16-bit files: Pillow reports damage as an exception, libpng only on stderr
    except (OSError, ValueError, SyntaxError, Image.DecompressionBombError) as e:
        raise _fail(manifest_file, view, fld, path, f"cannot decode ({e})",
                    hint="the file is damaged or truncated; copy it again from the camera") from None


def header_size(path: Path) -> tuple[int, int] | None:
    """(width, height) of the upright image from its header alone, or None if it cannot tell."""
    try:
        if is_raw(path):
            return _raw_size(path, "", "", "image")
        _heif_opener()
        with Image.open(path) as im:
            w, h = im.size
            orient = im.getexif().get(0x0112, 1)
    except Exception:  # verify_image reports what is wrong with the file
        return None
    return (h, w) if orient in SWAPS_AXES else (w, h)


@contextmanager
def _decoded(path: Path, manifest_file: str, view: str, fld: str) -> Iterator[tuple[Image.Image, bool, int]]:
    """The open image, decoded once in full (damage shows), whether it needs the wide decoder, and
    its EXIF orientation; closed on leaving."""
    im, wide = _open(path, manifest_file, view, fld)
    with im:
        _load(im, path, manifest_file, view, fld)
        yield im, wide, _orientation(im)


def verify_image(path: Path, manifest_file: str, view: str, fld: str) -> tuple[int, int]:
    """Decode the whole file once (damage shows), keep no pixels; -> upright (width, height).

    A RAW file is unpacked, not developed (demosaicing is the slow part and cannot fail on its own)."""
    if is_raw(path):
        return _raw_size(path, manifest_file, view, fld)
    with _decoded(path, manifest_file, view, fld) as (im, _, orient):
        w, h = im.size
    return (h, w) if orient in SWAPS_AXES else (w, h)


def decode_levels(path: Path, manifest_file: str, view: str, fld: str) -> np.ndarray:
    """Decode a photo or mask file upright -> (H, W, C) uint8 or uint16 code values, C in (1, 2, 3, 4).

    C = 1 grey, 2 grey + alpha, 3 RGB, 4 RGBA. Raises InputError naming file, view and field.
    """
    if is_raw(path):
        return _raw_levels(path, manifest_file, view, fld)
    with _decoded(path, manifest_file, view, fld) as (im, wide, orient):
        if wide:
            return np.ascontiguousarray(_ORIENT[orient](_decode_wide(path, manifest_file, view, fld)))
        up = ImageOps.exif_transpose(im)
        if up.mode in _SIXTEEN_BIT_GREY:
            return np.asarray(up, dtype=np.uint16)[..., None]
        target = _EIGHT_BIT[up.mode] or ("RGBA" if "transparency" in up.info else "RGB")
        a = np.asarray(up.convert(target) if target != up.mode else up, dtype=np.uint8)
    return a[..., None] if a.ndim == 2 else a


def decode_image(path: Path, manifest_file: str, view: str, fld: str) -> np.ndarray:
    """decode_levels scaled to (H, W, C) float32 in [0, 1]."""
    a = decode_levels(path, manifest_file, view, fld)
    return a.astype(np.float32) / np.float32(np.iinfo(a.dtype).max)


@lru_cache(maxsize=2)
def linear_table(dtype: str) -> np.ndarray:
    """sRGB code value -> linear light for every 8- or 16-bit level (the IEC curve, tabulated once)."""
    top = np.iinfo(dtype).max
    return srgb_to_linear(np.arange(top + 1, dtype=np.float32) / np.float32(top))


def _check_size(a: np.ndarray, path: Path, manifest_file: str, view: str, fld: str,
                size: tuple[int, int]) -> None:
    if a.shape[1] != size[0] or a.shape[0] != size[1]:
        raise _fail(manifest_file, view, fld, path, f"is {a.shape[1]}x{a.shape[0]} (upright) but the camera "
                    f"says {size[0]}x{size[1]}", hint="fix the camera's width/height or use the original photo")


def rgb_levels(a: np.ndarray) -> np.ndarray:
    """(H, W, C) uint8/uint16 code values -> (H, W, 3) of the same dtype (grey replicated, alpha dropped)."""
    return np.repeat(a[..., :1], 3, axis=2) if a.shape[2] in (1, 2) else a[..., :3]


def photo_from_levels(a: np.ndarray) -> np.ndarray:
    """(H, W, C) uint8/uint16 sRGB code values -> (H, W, 3) float32 linear light (alpha dropped).

    A table lookup gives the same numbers as srgb_to_linear(a / max) at a fraction of the time.
    """
    return linear_table(a.dtype.name)[rgb_levels(a)]


def mask_from_array(a: np.ndarray) -> np.ndarray:
    """(H, W, C) float32 in [0, 1] -> (H, W) bool; an alpha channel, when present, is the mask."""
    if a.shape[2] in (2, 4):
        return a[..., -1] >= 0.5
    return a.mean(axis=2) >= 0.5


def load_photo_levels(path: Path, manifest_file: str, view: str, size: tuple[int, int]) -> np.ndarray:
    """Decode a photo to (H, W, 3) uint8/uint16 sRGB code values; linear_table(dtype)[levels] is
    exactly load_photo's result. `size` = (width, height) expected."""
    a = decode_levels(path, manifest_file, view, "image")
    _check_size(a, path, manifest_file, view, "image", size)
    return rgb_levels(a)


def load_photo(path: Path, manifest_file: str, view: str, size: tuple[int, int]) -> np.ndarray:
    """Decode a photo to (H, W, 3) float32 linear light. `size` = (width, height) expected."""
    levels = load_photo_levels(path, manifest_file, view, size)
    return linear_table(levels.dtype.name)[levels]


def load_mask(path: Path | None, manifest_file: str, view: str, size: tuple[int, int]) -> np.ndarray | None:
    """Decode a mask to (H, W) bool, white (>= 0.5) = object. None when the view has none."""
    if path is None:
        return None
    a = decode_image(path, manifest_file, view, "mask")
    _check_size(a, path, manifest_file, view, "mask", size)
    m = mask_from_array(a)
    if not m.any():
        raise _fail(manifest_file, view, "mask", path, "the mask is empty (no white pixel = no object)",
                    hint="white marks the object; remove the mask line to use the whole photo")
    return m
