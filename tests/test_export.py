"""Exporters against the Khronos glTF validator, the PNG spec, trimesh's readers and pyrender."""

from __future__ import annotations

import json
import os
import shutil
import struct
import subprocess
from pathlib import Path

import numpy as np
import pygltflib
import pytest
import trimesh
from PIL import Image

from featuretex import plugins
from featuretex.export import Exporter
from featuretex.export.gltf import build_glb, read_texcoords, write_glb
from featuretex.export.obj import write_obj
from featuretex.export.ply import write_vertex_colour_ply
from featuretex.png import encode_texture_png, write_texture_png
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.mesh import SceneMesh, make_atlas, smooth_normals

REPO = Path(__file__).resolve().parents[1]
VALIDATOR_JS = REPO / "tests" / "tools" / "validate_gltf.js"
T = 64          # texture size, texels
BLOCK = 4       # checker blocks of 4 x 4 texels with one random colour each
UNLIT = "KHR_materials_unlit"


# --------------------------------------------------------------------------------------------
# fixtures: an xatlas'd sphere (many UV seams) and a random-colour checker of our own making
# --------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def sphere() -> SceneMesh:
    s = trimesh.creation.icosphere(subdivisions=3)
    v, f, uv = make_atlas(np.asarray(s.vertices), np.asarray(s.faces), T)
    return SceneMesh(vertices=v, faces=f, uv=uv, normals=smooth_normals(v, f), uv_generated=True)


@pytest.fixture(scope="module")
def checker() -> np.ndarray:
    """(T, T, 3) uint8 sRGB: no symmetry, so a flipped or shifted lookup shows."""
    blocks = np.random.default_rng(0).integers(0, 256, (T // BLOCK, T // BLOCK, 3), dtype=np.uint8)
    return np.repeat(np.repeat(blocks, BLOCK, 0), BLOCK, 1)


def _png_chunks(data: bytes) -> list[tuple[bytes, bytes]]:
    """(type, data) of every chunk, read by the layout of the PNG spec (section 5.3)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    out, off = [], 8
    while off < len(data):
        n = struct.unpack(">I", data[off:off + 4])[0]
        out.append((data[off + 4:off + 8], data[off + 8:off + 8 + n]))
        off += 12 + n
    return out


# --------------------------------------------------------------------------------------------
# PNG
# --------------------------------------------------------------------------------------------
def test_png_8bit_round_trip(tmp_path, checker):
    rng = np.random.default_rng(1)
    srgb = rng.random((20, 30, 3))
    p = write_texture_png(tmp_path / "t.png", srgb)
    with Image.open(p) as im:                                     # Pillow's decoder
        assert im.mode == "RGB" and im.size == (30, 20)
        assert np.array_equal(np.asarray(im), np.rint(srgb * 255).astype(np.uint8))
    chunks = _png_chunks(p.read_bytes())
    ihdr = chunks[0][1]
    assert chunks[0][0] == b"IHDR" and ihdr[8] == 8 and ihdr[9] == 2   # PNG spec: bit depth 8, truecolour
    assert (b"sRGB", b"\x00") in chunks                                 # PNG spec 11.3.3.5
    # uint8 input is written unchanged
    p2 = write_texture_png(tmp_path / "c.png", checker)
    assert np.array_equal(np.asarray(Image.open(p2)), checker)
    assert not [q for q in tmp_path.iterdir() if q.name.startswith(".")]  # no temporary left behind


def test_png_16bit_round_trip(tmp_path):
    import cv2

    srgb = np.random.default_rng(2).random((17, 9, 3))
    p = write_texture_png(tmp_path / "t16.png", srgb, bits=16)
    ihdr = _png_chunks(p.read_bytes())[0][1]
    assert ihdr[8] == 16 and ihdr[9] == 2                               # PNG spec: 16-bit truecolour
    back = cv2.imread(str(p), cv2.IMREAD_UNCHANGED)[..., ::-1]          # OpenCV/libpng decoder, BGR
    assert back.dtype == np.uint16
    assert np.array_equal(back, np.rint(srgb * 65535).astype(np.uint16))


def test_png_refuses_bad_arrays(tmp_path):
    with pytest.raises(ValueError):
        encode_texture_png(np.zeros((4, 4)))
    with pytest.raises(ValueError):
        encode_texture_png(np.full((4, 4, 3), np.nan))
    with pytest.raises(ValueError):
        encode_texture_png(np.zeros((4, 4, 3)), bits=12)


# --------------------------------------------------------------------------------------------
# glTF: Khronos validator and structure
# --------------------------------------------------------------------------------------------
def _validate(path: Path) -> dict:
    """The Khronos glTF-Validator's report (npm gltf-validator, run by tests/tools/validate_gltf.js)."""
    have = (REPO / "node_modules" / "gltf-validator").is_dir() and shutil.which("node")
    if not have:
        msg = "Khronos glTF validator missing: run `npm install --no-audit --no-fund` in the repo root"
        if os.environ.get("CI") == "true":
            pytest.fail(msg)
        pytest.skip(msg)
    r = subprocess.run(["node", str(VALIDATOR_JS), str(path)], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


def _split(glb: bytes) -> tuple[dict, bytes]:
    """GLB bytes -> (JSON tree, BIN chunk), read by pygltflib."""
    doc = pygltflib.GLTF2.load_from_bytes(glb)
    return json.loads(doc.to_json()), doc.binary_blob()


@pytest.mark.parametrize("unlit", [True, False], ids=["unlit", "lit"])
def test_glb_has_zero_validator_errors(tmp_path, sphere, checker, unlit):
    png = encode_texture_png(checker)
    path = write_glb(tmp_path / "model.glb", sphere, png, unlit=unlit)
    report = _validate(path)
    issues = report["issues"]
    assert issues["numErrors"] == 0, issues["messages"]
    assert issues["numWarnings"] == 0, issues["messages"]
    info = report["info"]
    assert info["totalTriangleCount"] == len(sphere.faces)
    assert info["totalVertexCount"] == len(sphere.vertices)
    assert info["hasTextures"]
    assert (UNLIT in info.get("extensionsUsed", [])) == unlit



def test_validator_does_catch_a_broken_glb(tmp_path, sphere, checker):
    """The validator check can fail: an accessor claiming more vertices than its buffer holds."""
    doc = pygltflib.GLTF2.load_from_bytes(build_glb(sphere, encode_texture_png(checker)))
    doc.accessors[doc.meshes[0].primitives[0].attributes.POSITION].count += 1000
    bad = tmp_path / "bad.glb"
    bad.write_bytes(b"".join(doc.save_to_bytes()))
    assert _validate(bad)["issues"]["numErrors"] > 0


def test_glb_json_material_sampler_and_image(sphere, checker):
    png = encode_texture_png(checker)
    data = build_glb(sphere, png, unlit=True, name="thing")
    # glTF 2.0 spec 4.4.3: chunks start and end on 4-byte boundaries; header length = file length
    assert len(data) % 4 == 0 and struct.unpack_from("<I", data, 8)[0] == len(data)
    json_len = struct.unpack_from("<I", data, 12)[0]
    assert json_len % 4 == 0
    tree, binary = _split(data)
    mat = tree["materials"][0]
    assert mat["extensions"] == {UNLIT: {}} and tree["extensionsUsed"] == [UNLIT]
    assert UNLIT not in tree.get("extensionsRequired", [])
    pbr = mat["pbrMetallicRoughness"]
    assert pbr["metallicFactor"] == 0.0 and pbr["roughnessFactor"] == 1.0
    # OpenGL enums: 9987 LINEAR_MIPMAP_LINEAR, 9729 LINEAR, 33071 CLAMP_TO_EDGE (glTF spec 5.26)
    assert tree["samplers"] == [{"magFilter": 9729, "minFilter": 9987, "wrapS": 33071, "wrapT": 33071}]
    tex = tree["textures"][pbr["baseColorTexture"]["index"]]
    assert tex["sampler"] == 0
    img = tree["images"][tex["source"]]
    bv = tree["bufferViews"][img["bufferView"]]
    assert img["mimeType"] == "image/png"
    assert binary[bv["byteOffset"]:bv["byteOffset"] + bv["byteLength"]] == png   # embedded unchanged
    lit, _ = _split(build_glb(sphere, png, unlit=False))
    assert "extensions" not in lit["materials"][0] and "extensionsUsed" not in lit


def test_glb_texcoords_follow_gltf_convention(sphere, checker):
    # glTF 2.0 spec 3.7.2.1: UV origin at the top-left of the image, v down; ours is v up
    uv = read_texcoords(build_glb(sphere, encode_texture_png(checker)))
    assert np.allclose(uv[:, 0], sphere.uv[:, 0], atol=1e-6)
    assert np.allclose(uv[:, 1], 1.0 - sphere.uv[:, 1], atol=1e-6)


# --------------------------------------------------------------------------------------------
# OBJ + MTL, PLY
# --------------------------------------------------------------------------------------------
def test_obj_and_mtl(tmp_path, sphere):
    obj, mtl = write_obj(tmp_path / "model.obj", sphere, "texture.png", unlit=True)
    assert mtl.name == "model.mtl"
    lines = mtl.read_text().splitlines()
    assert "map_Kd texture.png" in lines and "illum 0" in lines
    kd = [ln.split()[1:] for ln in lines if ln.startswith("Kd ")]
    assert len(kd) == 1 and [float(x) for x in kd[0]] == [1.0, 1.0, 1.0]
    assert f"mtllib {mtl.name}" in obj.read_text().splitlines()
    # trimesh's OBJ reader gets the same surface, UVs (OBJ is v up, like us) and normals back
    back = trimesh.load(obj, force="mesh", process=False, maintain_order=True)
    assert np.allclose(back.vertices, sphere.vertices, atol=1e-6)
    assert np.array_equal(back.faces, sphere.faces)
    assert np.allclose(back.visual.uv, sphere.uv, atol=1e-6)
    with open(obj) as fh:   # trimesh's OBJ parser keeps the file's `vn` before any recompute
        parsed = next(iter(trimesh.exchange.obj.load_obj(fh, maintain_order=True)["geometry"].values()))
    assert np.allclose(parsed["vertex_normals"], sphere.normals, atol=1e-6)
    lit = write_obj(tmp_path / "lit.obj", sphere, unlit=False)[1].read_text().splitlines()
    assert "illum 1" in lit


def test_vertex_colour_ply(tmp_path, sphere):
    rng = np.random.default_rng(3)
    colours = rng.integers(0, 256, (len(sphere.vertices), 3), dtype=np.uint8)
    p = write_vertex_colour_ply(tmp_path / "diagnosis.ply", sphere.vertices, sphere.faces, colours)
    back = trimesh.load(p, process=False)                  # trimesh's PLY reader
    assert np.array_equal(back.faces, sphere.faces)
    assert np.allclose(back.vertices, sphere.vertices, atol=1e-6)
    assert np.array_equal(back.visual.vertex_colors[:, :3], colours)
    with pytest.raises(ValueError):
        write_vertex_colour_ply(tmp_path / "x.ply", sphere.vertices, sphere.faces, colours[:-1])


# --------------------------------------------------------------------------------------------
# plugins
# --------------------------------------------------------------------------------------------
def test_exporter_plugins_write_into_run_dir(tmp_path, sphere, checker):
    src = tmp_path / "bake"
    tex = write_texture_png(src / "texture.png", checker)
    before = tex.read_bytes()
    out = tmp_path / "run"
    written = []
    for name in ("glb", "obj"):
        exporter = plugins.load("exporters", name)()
        assert isinstance(exporter, Exporter) and exporter.name == name
        files = exporter.export(out, sphere, tex, unlit=True, gltf_from_scene=np.eye(4))
        assert files == exporter.outputs(out, tex)          # it declares exactly what it writes
        written += files
    names = sorted(p.name for p in written)
    assert names == ["model.glb", "model.mtl", "model.obj", "texture.png"]   # texture copied beside the MTL
    assert (out / "texture.png").read_bytes() == before and tex.read_bytes() == before
    assert sorted(p.name for p in out.iterdir()) == names                     # no temporaries left


# --------------------------------------------------------------------------------------------
# round trip: exported files re-loaded by trimesh, rendered by pyrender, against our own lookup
# --------------------------------------------------------------------------------------------
W, H = 160, 120


def _view():
    from featuretex.scene.camera import Camera
    from featuretex.scene.manifest import View

    cam = Camera("c", "pinhole", W, H, 200.0, 200.0, (W - 1) / 2, (H - 1) / 2)
    eye = np.array([2.2, -1.5, 1.0])
    z = -eye / np.linalg.norm(eye)                         # looks at the origin, +z forward
    x = np.cross(z, [0.0, 0.0, 1.0])
    x /= np.linalg.norm(x)
    y = np.cross(z, x)                                     # +y down in the image
    m = np.eye(4)
    m[:3, :3] = np.stack([x, y, z])
    m[:3, 3] = -m[:3, :3] @ eye
    return View("rt", Path("unused.png"), None, cam, m)


def _internal_render(mesh: SceneMesh, tex: np.ndarray, view) -> tuple[np.ndarray, np.ndarray]:
    """(H, W, 3) uint8 nearest-texel lookup at the G-buffer UVs, (H, W) bool coverage."""
    from featuretex.raster.embree import EmbreeRasteriser
    from featuretex.raster.gbuffer import GBuffer

    gb = GBuffer(view.name, EmbreeRasteriser(mesh).render(view))
    uv = gb.uv(mesh)
    row = np.clip(np.floor((1.0 - uv[..., 1]) * T).astype(int), 0, T - 1)   # v up: row 0 is v = 1
    col = np.clip(np.floor(uv[..., 0] * T).astype(int), 0, T - 1)
    return np.where(gb.coverage[..., None], tex[row, col], 0).astype(np.uint8), gb.coverage


def _pyrender(path: Path, view) -> tuple[np.ndarray, np.ndarray]:
    """(H, W, 3) uint8 unlit pyrender image of an exported file, nearest texels, (H, W) coverage."""
    os.environ.setdefault("PYOPENGL_PLATFORM", "egl")
    import pyrender

    tm = trimesh.load(path, force="mesh", process=False)
    pm = pyrender.Mesh.from_trimesh(tm, smooth=True)
    for prim in pm.primitives:
        # nearest texel: pyrender filters raw sRGB bytes, viewers filter linear values (docs/contracts.md, section 6)
        prim.material.baseColorTexture.sampler = pyrender.Sampler(magFilter=pyrender.GLTF.NEAREST,
                                                                  minFilter=pyrender.GLTF.NEAREST)
    scene = pyrender.Scene(bg_color=[0.0, 0.0, 0.0, 0.0], ambient_light=[0.0, 0.0, 0.0])
    scene.add(pm)
    cam = view.camera
    # GL pixel centres sit at +0.5 from OpenCV's (docs/contracts.md, section 6); explicit zfar
    pc = pyrender.IntrinsicsCamera(cam.fx, cam.fy, cam.cx + 0.5, cam.cy + 0.5, znear=0.05, zfar=100.0)
    # camera-to-world, and from our +y down / +z forward axes to OpenGL's +y up / -z forward
    scene.add(pc, pose=np.linalg.inv(view.world_to_camera) @ np.diag([1.0, -1.0, -1.0, 1.0]))
    r = pyrender.OffscreenRenderer(cam.width, cam.height)
    try:
        colour, depth = r.render(scene, flags=pyrender.RenderFlags.FLAT)   # FLAT = base colour, no light
    finally:
        r.delete()
    return colour[..., :3], depth > 0


def _compare(ours: np.ndarray, cov: np.ndarray, theirs: np.ndarray, pcov: np.ndarray) -> tuple[float, int]:
    """PSNR (dB) over pixels whose 3x3 neighbourhood is covered in both renders and one colour in
    ours: 4x MSAA blends samples at silhouettes and at colour edges (UV seams, checker edges)."""
    from scipy.ndimage import binary_erosion, maximum_filter, minimum_filter

    from featuretex.scoring.metrics import psnr

    both = binary_erosion(cov & pcov, np.ones((3, 3), bool), border_value=0)
    flat = np.all(minimum_filter(ours, size=(3, 3, 1)) == maximum_filter(ours, size=(3, 3, 1)), axis=-1)
    keep = both & flat
    return psnr(theirs / 255.0, ours / 255.0, keep), int(keep.sum())


def _export(kind: str, out: Path, mesh: SceneMesh, tex: np.ndarray) -> Path:
    write_texture_png(out / "texture.png", tex)
    if kind == "obj":
        return write_obj(out / "model.obj", mesh)[0]
    return write_glb(out / "model.glb", mesh, encode_texture_png(tex), unlit=(kind == "glb-unlit"))


@pytest.fixture(scope="module")
def internal(sphere, checker):
    view = _view()
    ours, cov = _internal_render(sphere, checker, view)
    return view, ours, cov


@pytest.mark.parametrize("kind", ["glb-unlit", "glb-lit", "obj"])
def test_round_trip_matches_internal_render(tmp_path, sphere, checker, internal, kind):
    view, ours, cov = internal
    path = _export(kind, tmp_path, sphere, checker)
    theirs, pcov = _pyrender(path, view)
    db, n = _compare(ours, cov, theirs, pcov)
    assert n > 0.4 * cov.sum()          # most of the object is compared, not a few lucky pixels
    assert db >= 40.0, f"{kind}: {db:.1f} dB over {n} px"


@pytest.mark.parametrize("kind", ["glb-unlit", "obj"])
def test_round_trip_catches_v_flip(tmp_path, sphere, checker, internal, kind):
    """A deliberately wrong export (v flipped once too often) must score far below the bar."""
    view, ours, cov = internal
    flipped = SceneMesh(sphere.vertices, sphere.faces, np.stack([sphere.uv[:, 0], 1 - sphere.uv[:, 1]], 1),
                        sphere.normals)
    theirs, pcov = _pyrender(_export(kind, tmp_path, flipped, checker), view)
    db, _ = _compare(ours, cov, theirs, pcov)
    assert db < 20.0, f"{kind}: a v flip still scores {db:.1f} dB"


def test_round_trip_catches_double_srgb_encoding(tmp_path, sphere, checker, internal):
    """A deliberately wrong export (sRGB values encoded a second time) must score far below the bar."""
    view, ours, cov = internal
    twice = np.rint(linear_to_srgb(checker / 255.0) * 255).astype(np.uint8)
    theirs, pcov = _pyrender(_export("glb-unlit", tmp_path, sphere, twice), view)
    db, _ = _compare(ours, cov, theirs, pcov)
    assert db < 25.0, f"double sRGB encoding still scores {db:.1f} dB"


# --------------------------------------------------------------------------------------------
# glTF frame: metres, the scene's up along +Y, as a viewer computes world space
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("up", [[0.0, 0.0, 1.0], [0.0, -1.0, 0.0], [0.3, -0.2, 0.9]], ids=["z", "-y", "tilted"])
def test_glb_world_bounds_are_metres_with_up_along_y(tmp_path, checker, up):
    from scipy.spatial.transform import Rotation

    from featuretex.export.gltf import gltf_from_scene, read_glb_mesh

    # a 100 x 200 x 300 mm box away from the origin, standing along `up`: scene units are mm
    up = np.asarray(up) / np.linalg.norm(up)
    box = trimesh.creation.box(extents=[100.0, 200.0, 300.0])
    stand = Rotation.align_vectors([up], [[0.0, 0.0, 1.0]])[0].as_matrix()   # box's +z (300 mm) along up
    v = (np.asarray(box.vertices) @ stand.T + [40.0, -70.0, 500.0])
    v, f, uv = make_atlas(v, np.asarray(box.faces), T)
    mesh = SceneMesh(v, f, uv, smooth_normals(v, f))
    m = gltf_from_scene(up, 0.001)
    path = write_glb(tmp_path / "model.glb", mesh, encode_texture_png(checker), gltf_from_scene=m)
    assert _validate(path)["issues"]["numErrors"] == 0
    # world space as trimesh's glTF loader computes it (node transforms applied)
    world = trimesh.load(path, force="scene").to_geometry().vertices
    assert np.ptp(world[:, 1]) == pytest.approx(0.300, abs=1e-6)               # 300 mm tall along +Y
    if np.abs(up).max() == 1.0:      # an axis: the box's sides stay axis-aligned, only turned about Y
        assert sorted(np.ptp(world, axis=0)) == pytest.approx([0.1, 0.2, 0.3], abs=1e-6)
    assert world[:, 1].min() == pytest.approx(float(np.min(v @ up)) * 0.001, abs=1e-6)   # height above 0
    # rigid up to the unit: distances are the scene's in metres, handedness kept (det > 0)
    d_scene = np.linalg.norm(v[1:] - v[0], axis=1) * 0.001
    assert np.allclose(np.linalg.norm(world[1:] - world[0], axis=1), d_scene, atol=1e-7)
    assert np.linalg.det(m[:3, :3]) > 0
    # the vertex data stay in the scene frame, the conversion is the root node's matrix (pygltflib)
    back, matrix = read_glb_mesh(path)
    assert np.allclose(back.vertices, v, atol=1e-3) and np.allclose(matrix, m)
    assert np.allclose(back.uv, uv, atol=1e-6) and np.array_equal(back.faces, f)


def test_gltf_from_scene_z_up_is_the_usual_conversion():
    """A +Z-up scene maps as (x, y, z) -> (x, z, -y), the conversion glTF tools apply to Z-up data
    (common practice), and a +Y-up scene in metres is left alone."""
    from featuretex.export.gltf import gltf_from_scene

    expected = np.array([[1, 0, 0, 0], [0, 0, 1, 0], [0, -1, 0, 0], [0, 0, 0, 1]], float)
    assert np.allclose(gltf_from_scene([0, 0, 1], 1.0), expected, atol=1e-12)
    assert np.array_equal(gltf_from_scene([0, 1, 0], 1.0), np.eye(4))
    assert np.allclose(gltf_from_scene([0, 0, 2], 0.01)[:3, :3], 0.01 * expected[:3, :3], atol=1e-12)
