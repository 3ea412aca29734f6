"""Texture PNG writer: sRGB-encoded RGB, 8 or 16 bits per channel, written atomically."""

from __future__ import annotations

import io
import struct
import zlib
from pathlib import Path

import numpy as np

from featuretex.atomic import write_bytes

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _quantise(srgb: np.ndarray, bits: int) -> np.ndarray:
    """(H, W, 3) float in [0, 1] or uint8/uint16 -> (H, W, 3) uint8 (bits 8) or uint16 (bits 16)."""
    a = np.asarray(srgb)
    if a.ndim != 3 or a.shape[2] != 3 or a.shape[0] == 0 or a.shape[1] == 0:
        raise ValueError(f"texture must be (H, W, 3), got {a.shape}")
    top = (1 << bits) - 1
    if a.dtype == np.uint8:
        return a if bits == 8 else a.astype(np.uint16) * 257          # 255 * 257 = 65535
    if a.dtype == np.uint16:
        return a if bits == 16 else np.rint(a / 257.0).astype(np.uint8)
    if not np.issubdtype(a.dtype, np.floating) or not np.all(np.isfinite(a)):
        raise ValueError("texture must be finite floats in [0, 1], uint8 or uint16")
    q = np.clip(np.rint(a.astype(np.float64) * top), 0, top)
    return q.astype(np.uint8 if bits == 8 else np.uint16)


def _with_srgb_chunk(png: bytes) -> bytes:
    """Insert an sRGB chunk (rendering intent 0, perceptual) right after IHDR (PNG spec 11.3.3.5).

    Without it readers must guess the colour space; with it every reader knows the values are sRGB.
    """
    assert png[:8] == PNG_SIGNATURE
    ihdr_len = struct.unpack(">I", png[8:12])[0]
    end = 8 + 12 + ihdr_len                               # length + type + data + CRC
    body = b"sRGB" + b"\x00"
    chunk = struct.pack(">I", 1) + body + struct.pack(">I", zlib.crc32(body) & 0xFFFFFFFF)
    return png[:end] + chunk + png[end:]


def encode_texture_png(srgb: np.ndarray, bits: int = 8) -> bytes:
    """PNG bytes of an sRGB texture (H, W, 3): float in [0, 1], uint8 or uint16; bits 8 or 16.

    8-bit goes through Pillow. Pillow has no 16-bit-per-channel RGB mode, so 16-bit goes through
    OpenCV's libpng encoder (which takes BGR channel order).
    """
    if bits not in (8, 16):
        raise ValueError(f"bits must be 8 or 16, got {bits}")
    q = _quantise(srgb, bits)
    if bits == 8:
        from PIL import Image

        buf = io.BytesIO()
        Image.fromarray(np.ascontiguousarray(q)).save(buf, format="PNG", compress_level=6)
        data = buf.getvalue()
    else:
        import cv2

        ok, enc = cv2.imencode(".png", np.ascontiguousarray(q[..., ::-1]))
        if not ok:
            raise RuntimeError("OpenCV could not encode the 16-bit PNG")
        data = enc.tobytes()
    return _with_srgb_chunk(data)


def write_texture_png(path: str | Path, srgb: np.ndarray, bits: int = 8) -> Path:
    """Write an sRGB texture (H, W, 3) as PNG, atomically. Returns the path."""
    path = Path(path)
    write_bytes(path, encode_texture_png(srgb, bits))
    return path
