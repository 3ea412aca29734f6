"""PLY export of a mesh with per-vertex colours (the diagnosis for any mesh viewer), via trimesh."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import trimesh

from featuretex.atomic import write_bytes


def write_vertex_colour_ply(path: str | Path, vertices: np.ndarray, faces: np.ndarray,
                            colours: np.ndarray) -> Path:
    """Binary little-endian PLY, atomically. Returns the path.

    vertices: (V, 3) float, scene units; faces: (F, 3) int; colours: (V, 3) uint8 sRGB.
    """
    colours = np.asarray(colours)
    vertices = np.asarray(vertices, dtype=np.float64)
    if colours.shape != (len(vertices), 3) or colours.dtype != np.uint8:
        raise ValueError(f"colours must be (V, 3) uint8 with V = {len(vertices)}, got {colours.shape} {colours.dtype}")
    rgba = np.concatenate([colours, np.full((len(colours), 1), 255, np.uint8)], axis=1)
    tm = trimesh.Trimesh(vertices, np.asarray(faces, dtype=np.int64), vertex_colors=rgba, process=False)
    path = Path(path)
    write_bytes(path, trimesh.exchange.ply.export_ply(tm, encoding="binary", include_attributes=False))
    return path
