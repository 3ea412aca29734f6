"""The diagnosis's artefacts: error_map.npz, error_map.png (UV space, legend), diagnosis.ply."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from featuretex.atomic import atomic_path, write_bytes
from featuretex.diagnose.core import Diagnosis
from featuretex.diagnose.numbered import draw_numbers, legend_lines
from featuretex.diagnose.palette import paint, with_legend
from featuretex.diagnose.verdict import length
from featuretex.export.ply import write_vertex_colour_ply
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.loaded import Scene
from featuretex.texels.gutter import fill_texture

MIN_MAP_PX = 512   # the PNG map is upscaled (nearest) to at least this many pixels per side


def write_outputs(run_dir: str | Path, diagnosis: Diagnosis, scene: Scene, texels: TexelBuffer) -> dict[str, Path]:
    """Write the three files atomically into run_dir; return their paths by name."""
    run_dir = Path(run_dir)
    paths = {"npz": run_dir / "error_map.npz", "png": run_dir / "error_map.png", "ply": run_dir / "diagnosis.ply"}
    write_npz(paths["npz"], diagnosis, scene)
    uv_map = painted_map(diagnosis, texels)
    write_png(paths["png"], uv_map, diagnosis, scene)
    write_ply(paths["ply"], uv_map, diagnosis, scene, texels)
    return paths


def write_npz(path: Path, dg: Diagnosis, scene: Scene) -> None:
    """(T, T) float32 fields geometry, texture, coverage, displacement (scene units; NaN unknown),
    cls uint8, the extra evidence fields, and the unit and verdict as strings."""
    arrays = {"geometry": dg.geometry, "texture": dg.texture, "coverage": dg.coverage,
              "displacement": dg.displacement, "cls": dg.cls, **dg.extra,
              "unit": np.array(scene.manifest.unit), "verdict": np.array(dg.verdict)}
    with atomic_path(path) as tmp:
        np.savez_compressed(tmp, **arrays)


def painted_map(dg: Diagnosis, texels: TexelBuffer) -> np.ndarray:
    """(S, S, 3) uint8 UV-space map, v up (row 0 = v 1), from the finer of texture and working grid."""
    w = dg.work
    if "cls" in w and w["cls"].shape[0] > dg.cls.shape[0]:
        img = paint(w["cls"], w["geometry"], w["texture"])
    else:
        img = paint(dg.cls, dg.geometry, dg.texture)
    k = max(1, -(-MIN_MAP_PX // img.shape[0]))
    return np.repeat(np.repeat(img, k, axis=0), k, axis=1)


def write_png(path: Path, uv_map: np.ndarray, dg: Diagnosis, scene: Scene) -> None:
    unit, um = scene.manifest.unit, scene.manifest.unit_m
    a = dg.areas
    f = dg.figures
    open_uncovered = a["uncovered"] - a.get("uncovered_hidden", 0.0)
    lines = [f"uncovered {100 * open_uncovered:.1f} %   cavity {100 * a.get('uncovered_hidden', 0.0):.1f} %   "
             f"geometry-limited {100 * a['geometry_limited']:.1f} %   "
             f"texture-limited {100 * a['texture_limited']:.1f} % of the surface",
             f"geometry tolerance {length(f.get('geometry_tol', float('nan')), unit, um)}; sweep range "
             f"+/- {length(f.get('sweep_half_range', float('nan')), unit, um)}; {f.get('views', 0)} fitted views"
             + ("" if f.get("used_alignment") else "; no alignment fields"),
             "UV space, v up; G / T: fixing the geometry / fitting longer pays more"] + legend_lines(dg.regions)
    img = with_legend(uv_map, f"verdict: {dg.verdict}", lines)
    if "region" in dg.work:
        k = uv_map.shape[0] // dg.work["region"].shape[0]
        draw_numbers(img, np.repeat(np.repeat(dg.work["region"], k, axis=0), k, axis=1), dg.regions)
    buf = io.BytesIO()
    img.save(buf, format="PNG", compress_level=6)
    write_bytes(path, buf.getvalue())


def write_ply(path: Path, uv_map: np.ndarray, dg: Diagnosis, scene: Scene, texels: TexelBuffer) -> None:
    """Vertex colours = the map at each vertex's UV, after padding islands so rim vertices read
    their own island (not the background)."""
    S = uv_map.shape[0]
    on = _surface_mask(dg, texels, S)
    filled = fill_texture(uv_map.astype(np.float32) / 255.0, on, on, gutter=8)
    uv = scene.mesh.uv
    col = np.clip((uv[:, 0] * S).astype(np.int64), 0, S - 1)
    row = np.clip(((1.0 - uv[:, 1]) * S).astype(np.int64), 0, S - 1)
    rgb = np.clip(np.rint(filled[row, col] * 255), 0, 255).astype(np.uint8)
    write_vertex_colour_ply(path, scene.mesh.vertices, scene.mesh.faces, rgb)


def _surface_mask(dg: Diagnosis, texels: TexelBuffer, S: int) -> np.ndarray:
    w = dg.work
    valid = w["valid"] if "valid" in w and w["valid"].shape[0] > texels.size else texels.valid
    k = S // valid.shape[0]
    return np.repeat(np.repeat(valid, k, axis=0), k, axis=1)
