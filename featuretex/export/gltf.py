"""glTF 2.0 binary (.glb) export through pygltflib's object model.

The file holds one mesh (positions, normals, UVs, triangle indices) whose vertex data stay in the
scene's frame and unit, under a root node whose matrix maps scene coordinates to glTF's: metres,
+Y up, the scene's up direction mapped to +Y (`gltf_from_scene`). A viewer applies the node
matrix, so the model opens upright and at true size; the scene-frame vertex data read back
unchanged (`read_glb_mesh`).

- glTF texture coordinates have their origin at the top-left of the image, ours at the
  bottom-left, so TEXCOORD_0 = (u, 1 - v).
- The caller's PNG is embedded byte for byte (sRGB-encoded base colour, as glTF requires).
- One sampler: LINEAR_MIPMAP_LINEAR minification, LINEAR magnification, CLAMP_TO_EDGE in u and v.
  Atlas UVs lie inside [0, 1] and never tile, so REPEAT would only let bilinear and mipmap
  filtering at the image border wrap around and blend texels of the opposite edge into charts
  that touch the border; CLAMP_TO_EDGE reads the border's own gutter instead.
- Material: metallic 0 / roughness 1 (a baked scan texture already holds the lighting of the
  photos: no metal, no highlight); when unlit, KHR_materials_unlit in the material and in
  extensionsUsed (not extensionsRequired: a viewer without it falls back to the matte PBR).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pygltflib as gl

from featuretex.atomic import write_bytes
from featuretex.png import PNG_SIGNATURE
from featuretex.scene.mesh import SceneMesh

UNLIT = "KHR_materials_unlit"
GENERATOR = "featuretex"
ALIGN = 4   # glTF 2.0 spec 3.6.2.4: accessor data of float32/uint32 components start on 4-byte offsets


def gltf_from_scene(up: np.ndarray, unit_m: float) -> np.ndarray:
    """(4, 4) float64 matrix from scene coordinates (scene units) to glTF's (metres, +Y up).

    The rotation is the smallest one that turns `up` ((3,), scene frame) onto +Y, so a scene with
    +Z up gets glTF's usual (x, y, z) -> (x, z, -y); an `up` of -Y turns half a turn about +X.
    """
    u = np.asarray(up, np.float64)
    u = u / np.linalg.norm(u)
    y = np.array([0.0, 1.0, 0.0])
    axis = np.cross(u, y)
    s, c = float(np.linalg.norm(axis)), float(u @ y)
    if s < 1e-12:
        rot = np.eye(3) if c > 0 else np.diag([1.0, -1.0, -1.0])
    else:
        k = axis / s
        kx = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
        rot = np.eye(3) + s * kx + (1 - c) * (kx @ kx)       # Rodrigues' rotation formula
    m = np.eye(4)
    m[:3, :3] = float(unit_m) * rot
    return m


class _Blob:
    """The GLB's single binary buffer, built view by view (each 4-byte aligned)."""

    def __init__(self, doc: gl.GLTF2):
        self.doc = doc
        self.parts: list[bytes] = []
        self.size = 0

    def view(self, data: bytes, target: int | None = None) -> int:
        self.doc.bufferViews.append(gl.BufferView(buffer=0, byteOffset=self.size, byteLength=len(data),
                                                  target=target))
        padded = data + b"\x00" * (-len(data) % ALIGN)
        self.parts.append(padded)
        self.size += len(padded)
        return len(self.doc.bufferViews) - 1

    def accessor(self, a: np.ndarray, kind: str, target: int, *, bounds: bool = False) -> int:
        """Append (N, k) float32 or (N,) uint32 data as a bufferView + accessor; returns its index."""
        ctype = gl.FLOAT if a.dtype == np.float32 else gl.UNSIGNED_INT
        acc = gl.Accessor(bufferView=self.view(np.ascontiguousarray(a).tobytes(), target),
                          componentType=ctype, count=len(a), type=kind)
        if bounds:   # required for POSITION (glTF 2.0 spec 3.7.2.1)
            acc.min, acc.max = a.min(axis=0).tolist(), a.max(axis=0).tolist()
        self.doc.accessors.append(acc)
        return len(self.doc.accessors) - 1

    def bytes(self) -> bytes:
        return b"".join(self.parts)


def _material(name: str, unlit: bool) -> gl.Material:
    pbr = gl.PbrMetallicRoughness(baseColorTexture=gl.TextureInfo(index=0, texCoord=0),
                                  metallicFactor=0.0, roughnessFactor=1.0)
    return gl.Material(name=name, pbrMetallicRoughness=pbr, doubleSided=False,
                       extensions={UNLIT: {}} if unlit else {})


def build_glb(mesh: SceneMesh, texture_png_bytes: bytes, *, gltf_from_scene: np.ndarray | None = None,
              unlit: bool = True, name: str = "scan") -> bytes:
    """GLB bytes of `mesh` textured with the given PNG (sRGB base colour).

    gltf_from_scene: (4, 4) scene -> glTF matrix, written as the root node's matrix (None: identity,
    for a mesh already in metres and +Y up).
    """
    if not texture_png_bytes.startswith(PNG_SIGNATURE):
        raise ValueError("texture_png_bytes is not a PNG file")
    doc = gl.GLTF2(asset=gl.Asset(version="2.0", generator=GENERATOR))
    blob = _Blob(doc)
    texcoord = np.stack([mesh.uv[:, 0], 1.0 - mesh.uv[:, 1]], axis=1)
    attributes = gl.Attributes(
        POSITION=blob.accessor(mesh.vertices.astype(np.float32), gl.VEC3, gl.ARRAY_BUFFER, bounds=True),
        NORMAL=blob.accessor(mesh.normals.astype(np.float32), gl.VEC3, gl.ARRAY_BUFFER),
        TEXCOORD_0=blob.accessor(texcoord.astype(np.float32), gl.VEC2, gl.ARRAY_BUFFER))
    indices = blob.accessor(mesh.faces.astype(np.uint32).ravel(), gl.SCALAR, gl.ELEMENT_ARRAY_BUFFER)
    doc.images.append(gl.Image(bufferView=blob.view(texture_png_bytes), mimeType="image/png"))
    doc.samplers.append(gl.Sampler(magFilter=gl.LINEAR, minFilter=gl.LINEAR_MIPMAP_LINEAR,
                                   wrapS=gl.CLAMP_TO_EDGE, wrapT=gl.CLAMP_TO_EDGE))
    doc.textures.append(gl.Texture(sampler=0, source=0))
    doc.materials.append(_material(name, unlit))
    if unlit:
        doc.extensionsUsed = [UNLIT]
    doc.meshes.append(gl.Mesh(name=name, primitives=[
        gl.Primitive(attributes=attributes, indices=indices, material=0, mode=gl.TRIANGLES)]))
    root = gl.Node(name=f"{name} (scene frame)", children=[1])
    m = np.eye(4) if gltf_from_scene is None else np.asarray(gltf_from_scene, np.float64)
    if not np.array_equal(m, np.eye(4)):
        root.matrix = m.T.ravel().tolist()      # glTF matrices are column-major
    doc.nodes += [root, gl.Node(name=name, mesh=0)]
    doc.scenes.append(gl.Scene(nodes=[0]))
    doc.scene = 0
    data = blob.bytes()
    doc.buffers.append(gl.Buffer(byteLength=len(data)))
    doc.set_binary_blob(data)
    return b"".join(doc.save_to_bytes())


def write_glb(path: str | Path, mesh: SceneMesh, texture_png_bytes: bytes, *,
              gltf_from_scene: np.ndarray | None = None, unlit: bool = True, name: str = "scan") -> Path:
    """Write `mesh` + texture as a glTF 2.0 binary, atomically. Returns the path."""
    path = Path(path)
    write_bytes(path, build_glb(mesh, texture_png_bytes, gltf_from_scene=gltf_from_scene, unlit=unlit,
                                name=name))
    return path


class GlbExporter:
    """Exporter plugin 'glb': `model.glb` in the run directory, metres and +Y up."""

    name = "glb"

    def export(self, out_dir: Path, mesh: SceneMesh, texture_png: Path, *, unlit: bool,
               gltf_from_scene: np.ndarray) -> list[Path]:
        return [write_glb(Path(out_dir) / "model.glb", mesh, Path(texture_png).read_bytes(),
                          gltf_from_scene=gltf_from_scene, unlit=unlit)]

    def outputs(self, out_dir: Path, texture_png: Path) -> list[Path]:
        return [Path(out_dir) / "model.glb"]


def _accessor_array(doc: gl.GLTF2, blob: bytes, index: int) -> np.ndarray:
    """The data of accessor `index` exactly as stored: (count, k) or (count,)."""
    acc = doc.accessors[index]
    bv = doc.bufferViews[acc.bufferView]
    dtype = {gl.FLOAT: np.float32, gl.UNSIGNED_INT: np.uint32, gl.UNSIGNED_SHORT: np.uint16}[acc.componentType]
    k = {gl.SCALAR: 1, gl.VEC2: 2, gl.VEC3: 3, gl.VEC4: 4}[acc.type]
    a = np.frombuffer(blob, dtype, acc.count * k, (bv.byteOffset or 0) + (acc.byteOffset or 0))
    return a.reshape(-1, k) if k > 1 else a


def read_texcoords(glb: bytes) -> np.ndarray:
    """(V, 2) float32 TEXCOORD_0 of the first primitive, exactly as stored (glTF's v down)."""
    doc = gl.GLTF2.load_from_bytes(glb)
    return _accessor_array(doc, doc.binary_blob(), doc.meshes[0].primitives[0].attributes.TEXCOORD_0)


def read_glb_mesh(path: str | Path) -> tuple[SceneMesh, np.ndarray]:
    """A glb written by `write_glb` -> (its mesh in the scene's frame and unit, (4, 4) gltf_from_scene).

    The vertex data are read as stored (the root node's matrix is not applied), UVs back to v up.
    """
    doc = gl.GLTF2.load_from_bytes(Path(path).read_bytes())
    blob = doc.binary_blob()
    prim = doc.meshes[0].primitives[0]
    uv = _accessor_array(doc, blob, prim.attributes.TEXCOORD_0).astype(np.float64)
    mesh = SceneMesh(vertices=_accessor_array(doc, blob, prim.attributes.POSITION).astype(np.float64),
                     faces=_accessor_array(doc, blob, prim.indices).astype(np.int64).reshape(-1, 3),
                     uv=np.stack([uv[:, 0], 1.0 - uv[:, 1]], axis=1),
                     normals=_accessor_array(doc, blob, prim.attributes.NORMAL).astype(np.float64))
    root = doc.nodes[doc.scenes[doc.scene or 0].nodes[0]]
    matrix = np.asarray(root.matrix, np.float64).reshape(4, 4).T if root.matrix else np.eye(4)
    return mesh, matrix
