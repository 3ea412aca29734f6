"""Wavefront OBJ + MTL export through trimesh, with UVs (v up, as OBJ) and vertex normals."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import trimesh

from featuretex.atomic import atomic_path, write_text
from featuretex.scene.mesh import SceneMesh


def _placeholder_image():
    """trimesh writes `map_Kd` only for a material with an image; the texture file itself is
    written elsewhere (texture.png), so a 1x1 image stands in and its bytes are dropped."""
    from PIL import Image

    img = Image.new("RGB", (1, 1), (255, 255, 255))
    img.format = "PNG"
    return img


def _fix_mtl(mtl: str, texture_name: str, unlit: bool) -> str:
    """Point map_Kd at `texture_name` and add the illumination model.

    illum 0 = colour only, no lighting (the texture already holds the photos' lighting);
    illum 1 = diffuse lighting without highlights, for viewers that want to shade the scan.
    """
    lines = [ln for ln in mtl.splitlines() if not ln.startswith(("map_Kd", "illum"))]
    lines += [f"illum {0 if unlit else 1}", f"map_Kd {texture_name}"]
    return "\n".join(lines) + "\n"


def write_obj(obj_path: str | Path, mesh: SceneMesh, texture_name: str = "texture.png", *,
              unlit: bool = True, name: str = "scan") -> list[Path]:
    """Write `obj_path` (e.g. model.obj) and the MTL beside it (model.mtl), atomically.

    The MTL has Kd 1 1 1, Ka 0, Ks 0 and `map_Kd texture_name` (a file the caller puts beside
    the OBJ). Returns [obj, mtl].
    """
    obj_path = Path(obj_path)
    mtl_path = obj_path.with_suffix(".mtl")
    tm = trimesh.Trimesh(mesh.vertices, mesh.faces, vertex_normals=mesh.normals, process=False)
    mat = trimesh.visual.material.SimpleMaterial(
        name=name, image=_placeholder_image(), diffuse=(255, 255, 255, 255),
        ambient=(0, 0, 0, 255), specular=(0, 0, 0, 255))
    tm.visual = trimesh.visual.TextureVisuals(uv=mesh.uv, material=mat)
    obj_text, files = trimesh.exchange.obj.export_obj(
        tm, include_normals=True, include_color=False, include_texture=True, return_texture=True,
        mtl_name=mtl_path.name, header="written by featuretex")
    write_text(mtl_path, _fix_mtl(files[mtl_path.name].decode("utf-8"), texture_name, unlit))
    write_text(obj_path, obj_text if obj_text.endswith("\n") else obj_text + "\n")
    return [obj_path, mtl_path]


class ObjExporter:
    """Exporter plugin 'obj': `model.obj` + `model.mtl`, referencing the texture by file name.

    OBJ defines no unit and no up axis: the file keeps the scene's frame and unit."""

    name = "obj"

    def export(self, out_dir: Path, mesh: SceneMesh, texture_png: Path, *, unlit: bool,
               gltf_from_scene: np.ndarray) -> list[Path]:
        out_dir, texture_png = Path(out_dir), Path(texture_png)
        written = write_obj(out_dir / "model.obj", mesh, texture_png.name, unlit=unlit)
        beside = out_dir / texture_png.name
        if texture_png.resolve() != beside.resolve():   # the MTL names the texture relative to itself
            with atomic_path(beside) as tmp:
                shutil.copyfile(texture_png, tmp)
            written.append(beside)
        return written

    def outputs(self, out_dir: Path, texture_png: Path) -> list[Path]:
        """model.obj, model.mtl and the texture beside them (a copy unless it is already there)."""
        out_dir = Path(out_dir)
        return [out_dir / "model.obj", out_dir / "model.mtl", out_dir / Path(texture_png).name]
