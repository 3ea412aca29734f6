"""The touch-up's files in `touchup/`: texture.png, the model through the configured exporters
(model.glb, model.obj + model.mtl) and offsets.ply (the offset along the normal of every vertex
as a float property `offset`, scene units, and as a colour)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import trimesh

from featuretex.atomic import write_bytes
from featuretex.export.base import declared_outputs, load_exporters
from featuretex.png import write_texture_png
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.mesh import SceneMesh

# offset colours: inward (the mesh moved in) blue, none neutral, outward orange; the diagnosis's
# blue-orange axis, which the common colour-vision deficiencies keep
INWARD, NONE, OUTWARD = np.array([47, 104, 178.0]), np.array([214, 210, 200.0]), np.array([232, 146, 48.0])


def offset_colours(offset: np.ndarray, scale: float) -> np.ndarray:
    """(V, 3) uint8 sRGB: neutral at 0, full blue / orange at -scale / +scale (scene units)."""
    x = np.clip(np.asarray(offset, np.float64) / max(scale, 1e-30), -1.0, 1.0)[:, None]
    rgb = np.where(x < 0, NONE + (-x) * (INWARD - NONE), NONE + x * (OUTWARD - NONE))
    return np.clip(np.rint(rgb), 0, 255).astype(np.uint8)


def write_offsets_ply(path: Path, mesh: SceneMesh, offset: np.ndarray, scale: float) -> Path:
    """Binary PLY of `mesh` with per-vertex `offset` (float, scene units) and its colour."""
    rgba = np.concatenate([offset_colours(offset, scale), np.full((len(offset), 1), 255, np.uint8)], axis=1)
    tm = trimesh.Trimesh(mesh.vertices, mesh.faces, vertex_colors=rgba, process=False)
    tm.vertex_attributes["offset"] = np.asarray(offset, np.float32)
    write_bytes(path, trimesh.exchange.ply.export_ply(tm, encoding="binary", include_attributes=True))
    return path


def write_model(out_dir: Path, mesh: SceneMesh, texture_lin: np.ndarray, formats: list[str], *, unlit: bool,
                gltf_from_scene: np.ndarray, bits: int = 8) -> list[Path]:
    """texture.png and the touched-up model through the exporter plugins named in `formats`
    (gltf_from_scene: (4, 4) the run's scene -> glTF matrix, as for the run's own model)."""
    out_dir.mkdir(parents=True, exist_ok=True)
    png = out_dir / "texture.png"
    write_texture_png(png, linear_to_srgb(texture_lin), bits=bits)
    written = [png]
    for ex in load_exporters(formats):
        written += ex.export(out_dir, mesh, png, unlit=unlit, gltf_from_scene=gltf_from_scene)
    return written


def model_files(out_dir: Path, formats: list[str]) -> list[Path]:
    """What `write_model` writes into `out_dir`: texture.png and every exporter's declared files."""
    png = out_dir / "texture.png"
    return [png] + [p for p in declared_outputs(load_exporters(formats), out_dir, png) if p != png]
