"""glTF 2.0 binary (.glb) export: trimesh writes the mesh, then the JSON chunk is patched.

trimesh 5.2 writes positions, normals, UVs (already flipped to glTF's v-down convention:
glTF texture coordinates have their origin at the top-left of the image, ours at the
bottom-left, so TEXCOORD_0 = (u, 1 - v)), indices and a PBR material. It writes no sampler,
no KHR_materials_unlit and re-encodes the texture, so afterwards this module:

- embeds the caller's PNG bytes as they are (sRGB-encoded base colour, as glTF requires);
- adds one sampler: LINEAR_MIPMAP_LINEAR minification, LINEAR magnification, CLAMP_TO_EDGE in
  u and v. Atlas UVs lie inside [0, 1] and never tile, so REPEAT would only let bilinear and
  mipmap filtering at the image border wrap around and blend texels of the opposite edge into
  charts that touch the border; CLAMP_TO_EDGE reads the border's own gutter instead;
- sets metallic 0 / roughness 1 (a baked scan texture already holds the lighting of the photos:
  no metal, no highlight) and, when unlit, adds KHR_materials_unlit to the material and to
  extensionsUsed (not extensionsRequired: a viewer without it falls back to the matte PBR);
- tags bufferViews with their GPU target and re-packs the GLB with 4-byte aligned chunks.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import trimesh

from featuretex.atomic import write_bytes
from featuretex.export.glb import buffer_view_blobs, pack_glb, relayout, split_glb
from featuretex.export.png import PNG_SIGNATURE
from featuretex.scene.mesh import SceneMesh

UNLIT = "KHR_materials_unlit"
# OpenGL enum values used by glTF samplers (glTF 2.0 spec, section 5.26)
LINEAR, LINEAR_MIPMAP_LINEAR, CLAMP_TO_EDGE = 9729, 9987, 33071
ARRAY_BUFFER, ELEMENT_ARRAY_BUFFER = 34962, 34963
GENERATOR = "featuretex"


def _placeholder_image():
    """1x1 PNG-format image: trimesh only needs *an* image to write the texture entries; the real
    PNG bytes replace its blob afterwards (no decode and re-encode of a large texture)."""
    from PIL import Image

    img = Image.new("RGB", (1, 1), (255, 255, 255))
    img.format = "PNG"
    return img


def to_trimesh_textured(mesh: SceneMesh, name: str) -> trimesh.Scene:
    """A one-node trimesh Scene of `mesh` with its UVs (v up), normals and a PBR material."""
    tm = trimesh.Trimesh(mesh.vertices, mesh.faces, vertex_normals=mesh.normals, process=False)
    mat = trimesh.visual.material.PBRMaterial(name=name, baseColorTexture=_placeholder_image(),
                                              metallicFactor=0.0, roughnessFactor=1.0)
    tm.visual = trimesh.visual.TextureVisuals(uv=mesh.uv, material=mat)
    scene = trimesh.Scene()
    scene.add_geometry(tm, geom_name=name, node_name=name)
    return scene


def _patch_material(tree: dict[str, Any], *, unlit: bool, name: str) -> None:
    if len(tree.get("materials", [])) != 1 or len(tree.get("textures", [])) != 1:
        raise RuntimeError("trimesh wrote an unexpected material layout")
    tree["samplers"] = [{"magFilter": LINEAR, "minFilter": LINEAR_MIPMAP_LINEAR,
                         "wrapS": CLAMP_TO_EDGE, "wrapT": CLAMP_TO_EDGE}]
    tree["textures"][0]["sampler"] = 0
    mat = tree["materials"][0]
    mat["name"] = name
    mat["pbrMetallicRoughness"] = {"baseColorTexture": {"index": 0, "texCoord": 0},
                                   "metallicFactor": 0.0, "roughnessFactor": 1.0}
    mat["doubleSided"] = False
    used = [e for e in tree.get("extensionsUsed", []) if e != UNLIT]
    mat.pop("extensions", None)
    if unlit:
        mat["extensions"] = {UNLIT: {}}
        used.append(UNLIT)
    if used:
        tree["extensionsUsed"] = used
    else:
        tree.pop("extensionsUsed", None)


def _tag_targets(tree: dict[str, Any]) -> None:
    """bufferView.target: index data -> ELEMENT_ARRAY_BUFFER, vertex attributes -> ARRAY_BUFFER."""
    acc = tree.get("accessors", [])
    for mesh in tree.get("meshes", []):
        for prim in mesh.get("primitives", []):
            if "indices" in prim:
                tree["bufferViews"][acc[prim["indices"]]["bufferView"]]["target"] = ELEMENT_ARRAY_BUFFER
            for a in prim.get("attributes", {}).values():
                tree["bufferViews"][acc[a]["bufferView"]]["target"] = ARRAY_BUFFER


def build_glb(mesh: SceneMesh, texture_png_bytes: bytes, *, unlit: bool = True, name: str = "scan") -> bytes:
    """GLB bytes of `mesh` textured with the given PNG (sRGB base colour)."""
    if not texture_png_bytes.startswith(PNG_SIGNATURE):
        raise ValueError("texture_png_bytes is not a PNG file")
    raw = trimesh.exchange.gltf.export_glb(to_trimesh_textured(mesh, name), include_normals=True)
    tree, binary = split_glb(raw)
    blobs = buffer_view_blobs(tree, binary)
    if len(tree.get("images", [])) != 1:
        raise RuntimeError("trimesh wrote no texture image")
    image = tree["images"][0]
    blobs[image["bufferView"]] = texture_png_bytes
    image["mimeType"] = "image/png"
    _patch_material(tree, unlit=unlit, name=name)
    _tag_targets(tree)
    tree["asset"] = {"version": "2.0", "generator": GENERATOR}
    return pack_glb(tree, relayout(tree, blobs))


def write_glb(path: str | Path, mesh: SceneMesh, texture_png_bytes: bytes, *, unlit: bool = True,
              name: str = "scan") -> Path:
    """Write `mesh` + texture as a glTF 2.0 binary, atomically. Returns the path."""
    path = Path(path)
    write_bytes(path, build_glb(mesh, texture_png_bytes, unlit=unlit, name=name))
    return path


class GlbExporter:
    """Exporter plugin 'glb': `model.glb` in the run directory."""

    name = "glb"

    def export(self, out_dir: Path, mesh: SceneMesh, texture_png: Path, *, unlit: bool) -> list[Path]:
        return [write_glb(Path(out_dir) / "model.glb", mesh, Path(texture_png).read_bytes(), unlit=unlit)]


def read_texcoords(glb: bytes) -> np.ndarray:
    """(V, 2) float32 TEXCOORD_0 of the first primitive, exactly as stored (glTF's v down)."""
    tree, binary = split_glb(glb)
    acc = tree["accessors"][tree["meshes"][0]["primitives"][0]["attributes"]["TEXCOORD_0"]]
    bv = tree["bufferViews"][acc["bufferView"]]
    start = bv.get("byteOffset", 0) + acc.get("byteOffset", 0)
    return np.frombuffer(binary, np.float32, acc["count"] * 2, start).reshape(-1, 2)
