"""Camera RAW and HEIC photos.

RAW: a small DNG written with tifffile from the tags of Adobe's DNG specification 1.4 (CFA layout,
black and white level, as-shot neutral, orientation), developed by featuretex through rawpy
(LibRaw), against OpenCV's bilinear Bayer demosaic of the same mosaic with the white balance and
black level applied by hand. HEIC: written by pillow-heif, read back against the original pixels
within the codec's loss.
"""

from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np
import pytest
import tifffile
from PIL import Image

from featuretex.errors import InputError
from featuretex.scene.images import header_size, load_mask, load_photo, load_photo_levels

H, W = 64, 96
WHITE, BLACK = 4095, 64
NEUTRAL = np.array([0.5, 1.0, 0.8])     # the camera's response to grey (DNG AsShotNeutral)
# XYZ (D65) -> linear sRGB, IEC 61966-2-1: makes the camera's colour space sRGB's own primaries
XYZ_TO_SRGB = np.array([[3.2406, -1.5372, -0.4986], [-0.9689, 1.8758, 0.0415], [0.0557, -0.2040, 1.0570]])


def _scene() -> np.ndarray:
    """(H, W, 3) smooth linear RGB in [0.1, 0.6]: demosaicing algorithms agree on smooth images."""
    yy, xx = np.mgrid[0:H, 0:W]
    return np.stack([0.1 + 0.5 * xx / W, 0.1 + 0.5 * yy / H, 0.3 + 0.2 * np.sin(xx / 10.0) * np.cos(yy / 13.0)], -1)


def _rational(values) -> list[int]:
    return [v for x in np.ravel(values) for v in (int(round(x * 10000)), 10000)]


def write_dng(path: Path, rgb: np.ndarray, orientation: int = 1) -> np.ndarray:
    """A DNG of `rgb` seen through an RGGB colour filter array -> the (H, W) uint16 mosaic stored."""
    cam = rgb * NEUTRAL                                  # sensor values before white balance
    cfa = np.empty(rgb.shape[:2])
    cfa[0::2, 0::2], cfa[0::2, 1::2] = cam[0::2, 0::2, 0], cam[0::2, 1::2, 1]
    cfa[1::2, 0::2], cfa[1::2, 1::2] = cam[1::2, 0::2, 1], cam[1::2, 1::2, 2]
    mosaic = np.rint(BLACK + cfa * (WHITE - BLACK)).astype(np.uint16)
    tags = [(271, "s", 0, "featuretex", True), (272, "s", 0, "test", True),     # Make, Model
            (274, "H", 1, orientation, True),                                     # Orientation
            (33421, "H", 2, (2, 2), True), (33422, "B", 4, (0, 1, 1, 2), True),   # CFA 2x2, R G / G B
            (50706, "B", 4, (1, 4, 0, 0), True), (50708, "s", 0, "featuretex test", True),
            (50721, "2i", 9, _rational(XYZ_TO_SRGB), True), (50778, "H", 1, 21, True),   # D65
            (50728, "2I", 3, _rational(NEUTRAL), True),                           # AsShotNeutral
            (50714, "H", 1, BLACK, True), (50717, "H", 1, WHITE, True)]           # Black/WhiteLevel
    tifffile.imwrite(path, mosaic, photometric=32803, extratags=tags)           # 32803 = CFA
    return mosaic


def _reference(mosaic: np.ndarray) -> np.ndarray:
    """OpenCV's bilinear demosaic, black level off, scaled to white, divided by the as-shot neutral.
    OpenCV names Bayer layouts by their second row: an R G / G B mosaic is COLOR_BayerBG2RGB."""
    rgb = cv2.cvtColor(mosaic, cv2.COLOR_BayerBG2RGB).astype(np.float64)
    return (rgb - BLACK) / (WHITE - BLACK) / NEUTRAL


@pytest.mark.parametrize("orientation", [1, 6], ids=["upright", "rotated"])
def test_dng_develops_linear_with_the_white_balance_as_shot(tmp_path, orientation):
    path = tmp_path / "p.dng"
    mosaic = write_dng(path, _scene(), orientation)
    size = (H, W) if orientation == 6 else (W, H)            # orientation 6: shown turned 90 clockwise
    assert header_size(path) == size
    lin = load_photo(path, "s.yaml", "v", size)
    if orientation == 6:
        lin = np.rot90(lin, 1)                                # back to the sensor's layout
    inner = (slice(4, -4), slice(4, -4))                      # the two demosaics differ at the border
    diff = np.abs(lin[inner] - _reference(mosaic)[inner])
    assert diff.mean() < 5e-4 and diff.max() < 3e-3, (diff.mean(), diff.max())
    # linear output, no brightening: the mean level is the scene's own (not auto-exposed)
    assert np.allclose(lin[inner].mean(axis=(0, 1)), _scene()[inner].mean(axis=(0, 1)), atol=2e-3)


def test_damaged_raw_and_raw_masks_are_refused(tmp_path):
    path = tmp_path / "p.dng"
    write_dng(path, _scene())
    cut = tmp_path / "cut.dng"
    cut.write_bytes(path.read_bytes()[:400])
    with pytest.raises(InputError) as e:
        load_photo(cut, "s.yaml", "v7", (W, H))
    assert "v7" in str(e.value) and "cut.dng" in str(e.value) and "image" in str(e.value)
    with pytest.raises(InputError, match="cannot be a mask"):
        load_mask(path, "s.yaml", "v7", (W, H))


def test_heic_reads_back_within_codec_loss(tmp_path):
    import pillow_heif

    yy, xx = np.mgrid[0:48, 0:64]
    rgb = np.stack([40 + 150 * xx / 64, 30 + 180 * yy / 48, 100 + 60 * np.sin(xx / 7.0)], -1).astype(np.uint8)
    path = tmp_path / "p.heic"
    pillow_heif.from_bytes("RGB", (64, 48), rgb.tobytes()).save(path, quality=95)   # pillow-heif's writer
    assert header_size(path) == (64, 48)
    got = load_photo_levels(path, "s.yaml", "v", (64, 48))
    err = np.abs(got.astype(int) - rgb)
    # 4:2:0 chroma and lossy coding at quality 95: a few levels (common practice)
    assert got.dtype == np.uint8 and err.mean() < 3 and err.max() < 16, (err.mean(), err.max())


def test_heic_orientation_is_applied_once(tmp_path):
    """An EXIF orientation saved into a HEIC is turned into the image's own rotation by the writer;
    the reader shows the photo upright with header and pixels agreeing."""
    import pillow_heif

    pillow_heif.register_heif_opener()
    rgb = np.zeros((48, 64, 3), np.uint8)
    rgb[:8, :8] = 255                                         # a mark at the top-left
    exif = Image.Exif()
    exif[0x0112] = 6
    Image.fromarray(rgb).save(tmp_path / "r.heic", quality=95, exif=exif.tobytes())
    size = header_size(tmp_path / "r.heic")
    got = load_photo_levels(tmp_path / "r.heic", "s.yaml", "v", size)
    assert size == (48, 64) and got.shape == (64, 48, 3)
    assert got[:8, -8:].mean() > 200 and got[:8, :8].mean() < 50    # turned 90 degrees clockwise
