"""The GLB container (glTF 2.0 binary, spec section 4.4): split into JSON + BIN and pack again.

Layout: 12-byte header (magic 'glTF', version 2, total length), then a JSON chunk padded with
spaces to a 4-byte boundary, then an optional BIN chunk padded with zeros to a 4-byte boundary.
Each chunk is (length, type, data); lengths count the padding.
"""

from __future__ import annotations

import json
import struct
from typing import Any

MAGIC = 0x46546C67        # b"glTF" little-endian
CHUNK_JSON = 0x4E4F534A   # b"JSON"
CHUNK_BIN = 0x004E4942    # b"BIN\0"
ALIGN = 4


def _pad(data: bytes, fill: bytes) -> bytes:
    return data + fill * (-len(data) % ALIGN)


def split_glb(data: bytes) -> tuple[dict[str, Any], bytes]:
    """GLB bytes -> (glTF JSON tree, BIN chunk bytes or b"")."""
    magic, version, total = struct.unpack_from("<III", data, 0)
    if magic != MAGIC or version != 2 or total != len(data):
        raise ValueError("not a glTF 2.0 binary, or a truncated one")
    off = 12
    tree: dict[str, Any] | None = None
    binary = b""
    while off < total:
        length, kind = struct.unpack_from("<II", data, off)
        body = data[off + 8:off + 8 + length]
        if kind == CHUNK_JSON:
            tree = json.loads(body.decode("utf-8"))
        elif kind == CHUNK_BIN:
            binary = body
        off += 8 + length
    if tree is None:
        raise ValueError("GLB has no JSON chunk")
    return tree, binary


def pack_glb(tree: dict[str, Any], binary: bytes) -> bytes:
    """(glTF JSON tree, BIN bytes) -> GLB bytes with both chunks 4-byte aligned."""
    js = _pad(json.dumps(tree, separators=(",", ":"), allow_nan=False).encode("utf-8"), b" ")
    out = [struct.pack("<II", len(js), CHUNK_JSON), js]
    if binary:
        bn = _pad(binary, b"\x00")
        out += [struct.pack("<II", len(bn), CHUNK_BIN), bn]
    body = b"".join(out)
    return struct.pack("<III", MAGIC, 2, 12 + len(body)) + body


def buffer_view_blobs(tree: dict[str, Any], binary: bytes) -> list[bytes]:
    """The bytes of every bufferView of buffer 0 (the GLB's BIN chunk), in order."""
    blobs = []
    for bv in tree.get("bufferViews", []):
        if bv.get("buffer", 0) != 0:
            raise ValueError("only single-buffer GLB files are handled")
        start = bv.get("byteOffset", 0)
        blobs.append(binary[start:start + bv["byteLength"]])
    return blobs


def relayout(tree: dict[str, Any], blobs: list[bytes]) -> bytes:
    """Lay `blobs` (one per bufferView) end to end, each starting on a 4-byte boundary.

    Rewrites every bufferView's byteOffset/byteLength and buffer 0's byteLength in `tree`; returns
    the new BIN bytes. 4-byte starts satisfy accessor alignment for float32 and uint32 data.
    """
    parts: list[bytes] = []
    off = 0
    for bv, blob in zip(tree.get("bufferViews", []), blobs, strict=True):
        bv["buffer"] = 0
        bv["byteOffset"] = off
        bv["byteLength"] = len(blob)
        padded = _pad(blob, b"\x00")
        parts.append(padded)
        off += len(padded)
    binary = b"".join(parts)
    if blobs:
        tree["buffers"] = [{"byteLength": len(binary)}]
    return binary
