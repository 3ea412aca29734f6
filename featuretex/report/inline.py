"""Images as data URIs (the report is one self-contained file) and number formatting for pages."""

from __future__ import annotations

import base64
import html
import io
import math
from pathlib import Path

import numpy as np
from PIL import Image


def data_uri(data: bytes, mime: str = "image/png") -> str:
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


def file_uri(path: Path) -> str:
    """A PNG file's own bytes as a data URI (no re-encoding: the pixels are the ones scored)."""
    return data_uri(path.read_bytes(), "image/png")


def image_png(image: Image.Image | np.ndarray) -> bytes:
    im = Image.fromarray(image) if isinstance(image, np.ndarray) else image
    buf = io.BytesIO()
    im.save(buf, format="PNG", optimize=False, compress_level=6)
    return buf.getvalue()


def thumbnail_uri(path: Path, max_px: int) -> tuple[str, tuple[int, int]]:
    """A PNG thumbnail (longest side <= max_px, Lanczos) of an image file, and the file's own size."""
    with Image.open(path) as im:
        full = im.size
        im = im.convert("RGBA" if "A" in im.getbands() else "RGB")
        im.thumbnail((max_px, max_px), Image.LANCZOS)
        return data_uri(image_png(im)), full


def esc(x: object) -> str:
    return html.escape(str(x), quote=True)


def absent(what: str) -> str:
    """A placeholder box saying what is not there (and why)."""
    return f'<div class="absent">{esc(what)}</div>'


def num(x: object, digits: int = 2, unit: str = "") -> str:
    """A finite number with `digits` decimals (and a unit), else an em dash."""
    if x is None or isinstance(x, bool):
        return "—"
    try:
        v = float(x)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return esc(x)
    if not math.isfinite(v):
        return "—"
    return f"{v:.{digits}f}{unit}"


def seconds(x: object) -> str:
    """Seconds as '0.42 s', '12.3 s' or '3 min 05 s'."""
    try:
        v = float(x)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return "—"
    if not math.isfinite(v):
        return "—"
    if v < 10:
        return f"{v:.2f} s"
    if v < 120:
        return f"{v:.1f} s"
    m, s = divmod(round(v), 60)
    return f"{m} min {s:02d} s"


def percent(x: object) -> str:
    """A 0..1 fraction as a percentage with sensible precision."""
    try:
        v = 100.0 * float(x)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return "—"
    if not math.isfinite(v):
        return "—"
    return f"{v:.2f} %" if v < 10 else f"{v:.1f} %"
