"""Synthetic scenes: textured test meshes, orbit cameras, pyrender photos and a scene-folder writer.

Used by the bundled demo and by tests that need a scene whose truth is known (a plane or sphere
with a known texture, a dent of known depth, parts no camera sees).

World frame: any; `orbit_poses` assumes +z up. Camera frame: OpenCV (+x right, +y down,
+z forward), pixel (0, 0) is the centre of the top-left pixel (docs/contracts.md, section 5).

What `render_views` returns, in linear light:

* `lit=False` (flat): pyrender writes the base-colour texture as it is filtered on its raw
  (sRGB-encoded) bytes, with no transfer function on output; we decode those bytes with the
  IEC 61966-2-1 curve, so a texel of sRGB byte b comes out as `srgb_to_linear(b / 255)`.
* `lit=True`: pyrender decodes the texture with the IEC curve, shades in linear light and encodes
  its output with a pure 2.2 power; we undo that power, so the values are the shader's own linear
  radiance (quantised to 8 bits before decoding).

Both modes render with pyrender's 4x MSAA, so silhouette pixels blend object and background.
The mask is the object's coverage of the pixel (the MSAA-resolved alpha over a transparent
background) >= 0.5: unlike the resolved depth buffer, which keeps one sample that sits off the
pixel centre (measured: about 0.4 px lower), it is centred like the colour.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import trimesh
from PIL import Image, ImageDraw

from featuretex.atomic import atomic_path, write_text
from featuretex.scene.camera import Camera
from featuretex.scene.colour import linear_to_srgb, srgb_to_linear, to_uint8
from featuretex.scene.manifest import FORMAT
from featuretex.scene.mesh import smooth_normals

ViewSpec = tuple[str, Camera, np.ndarray]   # (name, intrinsics, (4, 4) world_to_camera)
GL_FROM_CV = np.diag([1.0, -1.0, -1.0, 1.0])  # OpenCV camera axes -> OpenGL camera axes


# --------------------------------------------------------------------------------------------
# Textures
# --------------------------------------------------------------------------------------------
def checker_texture(size: int = 256, squares: int = 8,
                    colours: tuple[tuple[int, int, int], tuple[int, int, int]] = ((230, 226, 214), (38, 64, 140)),
                    ) -> Image.Image:
    """A `size` x `size` RGB checkerboard (sRGB bytes), `squares` squares per side, top-left = colours[0]."""
    idx = (np.arange(size) * squares // size)
    parity = (idx[:, None] + idx[None, :]) % 2
    pal = np.array(colours, dtype=np.uint8)
    return Image.fromarray(pal[parity], "RGB")


# A glyph is drawn from strokes between anchor points of a 3 x 5 grid (x in 0..2, y in 0..4).
_ANCHORS = [(x, y) for y in range(5) for x in range(3)]


def _glyph_strokes(rng: np.random.Generator) -> list[tuple[tuple[int, int], tuple[int, int]]]:
    """2-4 random strokes between distinct anchors, biased to verticals and diagonals like script."""
    strokes = []
    for _ in range(int(rng.integers(2, 5))):
        a, b = rng.choice(len(_ANCHORS), size=2, replace=False)
        strokes.append((_ANCHORS[a], _ANCHORS[b]))
    return strokes


def fine_print_coverage(width: int, height: int, *, glyph_px: float = 12.0, stroke_px: float = 1.5,
                        line_spacing: float = 1.6, seed: int = 0, supersample: int = 4) -> np.ndarray:
    """Ink coverage of dense glyph-like strokes ("fine print"), (height, width) float32 in [0, 1].

    Lines of words (2-7 glyphs, invented shapes, not any script) fill the area; `glyph_px` is
    the glyph height, `stroke_px` the stroke width, both in output pixels. Drawn with Pillow at
    `supersample` x resolution and box-filtered down, so strokes thinner than a pixel stay grey.
    """
    rng = np.random.default_rng(seed)
    s = supersample
    img = Image.new("L", (width * s, height * s), 0)
    draw = ImageDraw.Draw(img)
    gh = glyph_px * s
    gw = gh * 0.55
    lw = max(1, int(round(stroke_px * s)))
    alphabet = [_glyph_strokes(rng) for _ in range(40)]
    y = gh * 0.3
    while y + gh <= height * s:
        x = float(rng.uniform(0, gw))
        while x + gw <= width * s:
            for _ in range(int(rng.integers(2, 8))):
                if x + gw > width * s:
                    break
                slant = gh * 0.15
                for (ax, ay), (bx, by) in alphabet[int(rng.integers(len(alphabet)))]:
                    p = (x + ax / 2 * gw * 0.8 + (1 - ay / 4) * slant, y + ay / 4 * gh)
                    q = (x + bx / 2 * gw * 0.8 + (1 - by / 4) * slant, y + by / 4 * gh)
                    draw.line([p, q], fill=255, width=lw)
                x += gw * 1.15
            x += gw * 1.2  # word gap
        y += gh * line_spacing
    a = np.asarray(img, dtype=np.float32).reshape(height, s, width, s).mean(axis=(1, 3)) / 255.0
    return a


def fine_print_texture(size: int | tuple[int, int] = 512, *, glyph_px: float = 12.0, stroke_px: float = 1.5,
                       ink: tuple[int, int, int] = (46, 34, 28), paper: tuple[int, int, int] = (236, 229, 212),
                       seed: int = 0) -> Image.Image:
    """An RGB image of dense fine print (see fine_print_coverage); `size` = side or (width, height).

    Ink and paper are blended in linear light, as ink on paper mixes optically.
    """
    w, h = (size, size) if isinstance(size, int) else size
    cov = fine_print_coverage(w, h, glyph_px=glyph_px, stroke_px=stroke_px, seed=seed)[..., None]
    lin = (1 - cov) * srgb_to_linear(np.array(paper) / 255.0) + cov * srgb_to_linear(np.array(ink) / 255.0)
    return Image.fromarray(to_uint8(linear_to_srgb(lin)), "RGB")


# --------------------------------------------------------------------------------------------
# Meshes
# --------------------------------------------------------------------------------------------
def textured_mesh(vertices: np.ndarray, faces: np.ndarray, uv: np.ndarray,
                  texture: Image.Image | None) -> trimesh.Trimesh:
    """A trimesh.Trimesh with TextureVisuals (uv v up) and `texture` as its image; no processing."""
    m = trimesh.Trimesh(np.asarray(vertices, np.float64), np.asarray(faces, np.int64), process=False)
    m.visual = trimesh.visual.TextureVisuals(uv=np.asarray(uv, np.float64), image=texture)
    return m


def textured_plane(size: float | tuple[float, float], texture: Image.Image | None, *, subdivisions: int = 1,
                   centre: Sequence[float] = (0.0, 0.0, 0.0)) -> trimesh.Trimesh:
    """A flat rectangle in the plane z = centre[2], normal +z, `size` = (width along x, height along y).

    uv: u grows with x, v with y; (0, 0) at the (-x, -y) corner. `subdivisions` quads per side.
    """
    w, h = (size, size) if isinstance(size, (int, float)) else size
    n = int(subdivisions)
    t = np.linspace(0.0, 1.0, n + 1)
    uu, vv = np.meshgrid(t, t)                       # (n+1, n+1), row = v
    uv = np.stack([uu.ravel(), vv.ravel()], axis=1)
    c = np.asarray(centre, np.float64)
    verts = np.stack([(uv[:, 0] - 0.5) * w + c[0], (uv[:, 1] - 0.5) * h + c[1], np.full(len(uv), c[2])], axis=1)
    faces = _grid_faces(n + 1, n + 1)
    return textured_mesh(verts, faces, uv, texture)


def _grid_faces(rows: int, cols: int) -> np.ndarray:
    """(2 (rows-1)(cols-1), 3) triangles of a row-major vertex grid, counter-clockwise seen from +z
    when rows grow along +y and columns along +x."""
    i, j = np.meshgrid(np.arange(rows - 1), np.arange(cols - 1), indexing="ij")
    a = (i * cols + j).ravel()
    b, c, d = a + 1, a + cols, a + cols + 1
    return np.concatenate([np.stack([a, b, d], 1), np.stack([a, d, c], 1)]).astype(np.int64)


def textured_sphere(radius: float, texture: Image.Image | None, *, n_lat: int = 48, n_lon: int = 96,
                    centre: Sequence[float] = (0.0, 0.0, 0.0)) -> trimesh.Trimesh:
    """A UV sphere with an equirectangular layout: u = longitude / 2 pi (seam at +x), v = 0 south pole.

    The seam column is duplicated (so uv is continuous per triangle) and each pole has one vertex
    per longitude column; pole rows are triangles, not quads, so no face is degenerate. Outward normals.
    """
    lat = np.linspace(-np.pi / 2, np.pi / 2, n_lat + 1)    # rows: south to north
    lon = np.linspace(0.0, 2 * np.pi, n_lon + 1)           # cols; last = first (seam)
    la, lo = np.meshgrid(lat, lon, indexing="ij")
    verts = np.stack([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)], -1).reshape(-1, 3)
    uu = np.broadcast_to(lon / (2 * np.pi), la.shape).copy()
    uu[0] += 0.5 / n_lon                                   # pole vertices sit mid-column in uv
    uu[-1] += 0.5 / n_lon
    uv = np.stack([uu.ravel(), ((la + np.pi / 2) / np.pi).ravel()], axis=1)
    uv[:, 0] = np.clip(uv[:, 0], 0.0, 1.0)
    faces = _grid_faces(n_lat + 1, n_lon + 1)
    # drop the collapsed triangle of every pole quad (both of its pole corners coincide)
    pos = verts[faces]
    area2 = np.linalg.norm(np.cross(pos[:, 1] - pos[:, 0], pos[:, 2] - pos[:, 0]), axis=1)
    faces = faces[area2 > 1e-12]
    return textured_mesh(verts * radius + np.asarray(centre, np.float64), faces, uv, texture)


def dent_profile(r: np.ndarray, radius: float) -> np.ndarray:
    """Dent weight (1 - (r/R)^2)^2 for r < R, else 0: 1 at the centre, C1-smooth to 0 at the rim."""
    x = np.clip(np.asarray(r, np.float64) / radius, 0.0, 1.0)
    return (1.0 - x * x) ** 2


def dent(mesh: trimesh.Trimesh, centre: Sequence[float], radius: float, depth: float,
         normal: Sequence[float] | None = None) -> trimesh.Trimesh:
    """A copy of `mesh` pushed in along its vertex normals by depth * dent_profile(|p - centre|, radius).

    Distances are straight-line (3D); only vertices whose normal faces like `normal` (default: the
    normal of the vertex nearest `centre`), i.e. n . normal > 0, move, so the far side of a thin wall
    stays put. A vertex at `centre` moves by exactly `depth` (scene units; negative makes a bump).
    Vertices sharing a position (uv seams) move together. Visuals are kept; the input is not modified.
    """
    v = np.asarray(mesh.vertices, np.float64)
    n = smooth_normals(v, np.asarray(mesh.faces))
    c = np.asarray(centre, np.float64)
    d = np.linalg.norm(v - c, axis=1)
    ref = np.asarray(normal, np.float64) if normal is not None else n[int(np.argmin(d))]
    w = dent_profile(d, radius) * (n @ ref > 0)
    out = mesh.copy()
    out.vertices = v - (depth * w)[:, None] * n
    return out


# --------------------------------------------------------------------------------------------
# Cameras
# --------------------------------------------------------------------------------------------
def look_at(eye: Sequence[float], target: Sequence[float], up: Sequence[float] = (0.0, 0.0, 1.0)) -> np.ndarray:
    """(4, 4) world_to_camera of a camera at `eye` looking at `target`, OpenCV axes, image up ~ `up`."""
    eye, target, up = (np.asarray(a, np.float64) for a in (eye, target, up))
    z = target - eye
    z /= np.linalg.norm(z)
    x = np.cross(z, up)
    if np.linalg.norm(x) < 1e-9:   # looking straight along `up`: pick any right vector
        x = np.cross(z, [1.0, 0.0, 0.0] if abs(z[0]) < 0.9 else [0.0, 1.0, 0.0])
    x /= np.linalg.norm(x)
    y = np.cross(z, x)             # +y points down in the image
    m = np.eye(4)
    m[:3, :3] = np.stack([x, y, z])
    m[:3, 3] = -m[:3, :3] @ eye
    return m


def orbit_poses(n: int, radius: float, elevations_deg: Sequence[float], target: Sequence[float] = (0, 0, 0),
                seed: int = 0, azimuth_jitter: float = 0.1) -> list[np.ndarray]:
    """`n` (4, 4) world_to_camera poses on rings around `target` (+z up), all looking at it.

    Views are shared among the rings in proportion to cos(elevation) (a ring near the equator is
    longer: common practice), evenly spaced in azimuth with a random phase per ring and a jitter of
    `azimuth_jitter` x the spacing. Order: ring by ring (as given), azimuth increasing.
    """
    rng = np.random.default_rng(seed)
    el = np.radians(np.asarray(elevations_deg, np.float64))
    share = np.cos(el) / np.cos(el).sum() * n
    counts = np.floor(share).astype(int)
    for k in np.argsort(-(share - counts), kind="stable")[: n - counts.sum()]:
        counts[k] += 1
    tgt = np.asarray(target, np.float64)
    poses = []
    for e, m in zip(el, counts):
        if m == 0:
            continue
        step = 2 * np.pi / m
        az = rng.uniform(0, step) + step * np.arange(m) + rng.uniform(-azimuth_jitter, azimuth_jitter, m) * step
        for a in az:
            eye = tgt + radius * np.array([np.cos(e) * np.cos(a), np.cos(e) * np.sin(a), np.sin(e)])
            poses.append(look_at(eye, tgt))
    return poses


def perturb_pose(world_to_camera: np.ndarray, angle_deg: float, shift: float,
                 rng: np.random.Generator) -> np.ndarray:
    """A pose wrong by exactly `angle_deg` (about a random axis through the camera centre) and by
    exactly `shift` scene units (camera centre moved in a random direction)."""
    R, t = world_to_camera[:3, :3], world_to_camera[:3, 3]
    centre = -R.T @ t
    axis = rng.normal(size=3)
    axis /= np.linalg.norm(axis)
    direction = rng.normal(size=3)
    direction /= np.linalg.norm(direction)
    a = math.radians(angle_deg)
    K = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    dR = np.eye(3) + math.sin(a) * K + (1 - math.cos(a)) * K @ K   # Rodrigues' formula
    R2 = dR @ R
    out = np.eye(4)
    out[:3, :3] = R2
    out[:3, 3] = -R2 @ (centre + shift * direction)
    return out


# --------------------------------------------------------------------------------------------
# Rendering (pyrender, headless EGL)
# --------------------------------------------------------------------------------------------
def _pyrender():
    os.environ.setdefault("PYOPENGL_PLATFORM", "egl")
    import pyrender

    return pyrender


def _texture_image(mesh: trimesh.Trimesh) -> Image.Image | None:
    mat = getattr(mesh.visual, "material", None)
    if mat is None:
        return None
    img = getattr(mat, "baseColorTexture", None) or getattr(mat, "image", None)
    return img.convert("RGB") if img is not None else None


_GL_TEXTURE_MAX_ANISOTROPY = 0x84FE   # GL 4.6 / ARB_texture_filter_anisotropic


def _texture_class(pyrender, anisotropy: float):
    """pyrender.Texture, or a subclass that also sets anisotropic filtering once uploaded.

    Trilinear mipmapping alone picks the blur of a texel footprint's longest axis, which smears
    stretched texels (a jug's neck seen side-on) across several pixels; anisotropic filtering
    averages along the footprint instead, closer to what a camera pixel integrates.
    """
    if anisotropy <= 1:
        return pyrender.Texture

    class AnisotropicTexture(pyrender.Texture):
        def _add_to_context(self):
            super()._add_to_context()
            from OpenGL.GL import GL_TEXTURE_2D, glBindTexture, glTexParameterf

            glBindTexture(GL_TEXTURE_2D, self._texid)
            glTexParameterf(GL_TEXTURE_2D, _GL_TEXTURE_MAX_ANISOTROPY, float(anisotropy))
            glBindTexture(GL_TEXTURE_2D, 0)

    return AnisotropicTexture


def _material(pyrender, mesh: trimesh.Trimesh, lit: bool, texture_filter: str, roughness: float):
    from pyrender.constants import GLTF

    img = _texture_image(mesh)
    tex = None
    if img is not None:
        mag, minf = {"nearest": (GLTF.NEAREST, GLTF.NEAREST), "linear": (GLTF.LINEAR, GLTF.LINEAR),
                     "mipmap": (GLTF.LINEAR, GLTF.LINEAR_MIPMAP_LINEAR),
                     "anisotropic": (GLTF.LINEAR, GLTF.LINEAR_MIPMAP_LINEAR)}[texture_filter]
        sampler = pyrender.Sampler(magFilter=mag, minFilter=minf, wrapS=GLTF.CLAMP_TO_EDGE, wrapT=GLTF.CLAMP_TO_EDGE)
        cls = _texture_class(pyrender, 16.0 if texture_filter == "anisotropic" else 1.0)
        tex = cls(source=np.asarray(img, np.uint8), source_channels="RGB", sampler=sampler)
    return pyrender.MetallicRoughnessMaterial(baseColorFactor=[1.0, 1.0, 1.0, 1.0] if tex else [0.7, 0.7, 0.7, 1.0],
                                              baseColorTexture=tex, metallicFactor=0.0,
                                              roughnessFactor=float(roughness), doubleSided=not lit)


def _pyrender_mesh(pyrender, mesh: trimesh.Trimesh, lit: bool, texture_filter: str, roughness: float):
    v = np.asarray(mesh.vertices, np.float64)
    f = np.asarray(mesh.faces, np.int64)
    uv = getattr(mesh.visual, "uv", None)
    prim = pyrender.Primitive(positions=v.astype(np.float32), normals=smooth_normals(v, f).astype(np.float32),
                              texcoord_0=None if uv is None else np.asarray(uv, np.float32),
                              indices=f.astype(np.uint32),
                              material=_material(pyrender, mesh, lit, texture_filter, roughness))
    return pyrender.Mesh([prim])


MAX_LIGHTS = 4   # pyrender binds at most 4 directional lights and picks which from a set: keep within it


def soft_lights(seed: int = 0, count: int = MAX_LIGHTS, intensity: float = 1.6) -> list[tuple[np.ndarray, float]]:
    """`count` directional lights from the upper hemisphere (+z up), fixed in the world frame.

    Returns (direction the light travels (3,), intensity). One key light from above-front plus
    seeded fill lights spread in azimuth, like a light tent (soft, no single harsh shadow side).
    """
    rng = np.random.default_rng(seed)
    out = []
    for k in range(count):
        az = 2 * np.pi * k / count + rng.uniform(-0.3, 0.3)
        el = np.radians(rng.uniform(25, 70))
        towards_light = np.array([np.cos(el) * np.cos(az), np.cos(el) * np.sin(az), np.sin(el)])
        out.append((-towards_light, intensity * (1.0 if k == 0 else rng.uniform(0.45, 0.8))))
    return out


def _ordered_scene_class(pyrender):
    """A pyrender.Scene whose lights are bound in a fixed order (by node name).

    pyrender keeps lights in a set, so the order of the shader's light sum, and hence the last bit
    of a pixel, would change from run to run; a fixed order makes renders reproducible.
    """

    class OrderedScene(pyrender.Scene):
        @property
        def light_nodes(self):
            return sorted(super().light_nodes, key=lambda n: n.name or "")

    return OrderedScene


def _light_pose(direction: np.ndarray) -> np.ndarray:
    """Node pose whose -z axis is `direction` (pyrender directional lights shine along -z)."""
    z = -direction / np.linalg.norm(direction)
    x = np.cross([0.0, 0.0, 1.0], z) if abs(z[2]) < 0.99 else np.array([1.0, 0.0, 0.0])
    x /= np.linalg.norm(x)
    m = np.eye(4)
    m[:3, :3] = np.stack([x, np.cross(z, x), z], axis=1)
    return m


def render_views(mesh: trimesh.Trimesh, views: Sequence[ViewSpec], *, lit: bool, light_seed: int = 0,
                 background: Sequence[float] = (0.0, 0.0, 0.0), ambient: float = 0.18,
                 roughness: float = 0.45, texture_filter: str = "anisotropic",
                 lights: Sequence[tuple[Sequence[float], float]] | None = None,
                 znear: float | None = None, zfar: float | None = None) -> list[tuple[np.ndarray, np.ndarray]]:
    """Render `mesh` (with TextureVisuals: uv + image; else plain grey) from each view with pyrender.

    Returns per view (image (H, W, 3) float32 linear RGB, mask (H, W) bool: coverage >= 1/2); see the
    module doc for what the linear values mean in each mode. `background` is linear RGB.
    `texture_filter`: 'anisotropic' (trilinear + 16x anisotropic: close to a camera pixel averaging
    its footprint), 'mipmap' (trilinear only), 'linear' or 'nearest' (no mipmaps).
    `lit=True`: `soft_lights(light_seed)` + `ambient`, glaze-like dielectric specular
    (F0 = 0.04 in pyrender) with `roughness`; lights are fixed in the world frame. `lights`, when
    given, replaces the soft lights: (direction the light travels (3,), intensity) pairs.
    Pinhole only: a camera with distortion raises ValueError. One OffscreenRenderer serves all views.
    """
    pyrender = _pyrender()
    bg_lin = np.asarray(background, np.float64)
    # the clear colour is written to the output untouched: pre-encode it like the shader's output
    bg_out = bg_lin ** (1 / 2.2) if lit else linear_to_srgb(bg_lin)
    # background alpha 0: the MSAA-resolved alpha is then the object's coverage of each pixel
    scene = _ordered_scene_class(pyrender)(bg_color=[*map(float, bg_out), 0.0],
                                           ambient_light=[float(ambient)] * 3 if lit else [0.0] * 3)
    scene.add(_pyrender_mesh(pyrender, mesh, lit, texture_filter, roughness))
    if lit:
        lights = soft_lights(light_seed) if lights is None else lights
        if len(lights) > MAX_LIGHTS:
            raise ValueError(f"render_views: at most {MAX_LIGHTS} lights (pyrender's limit), got {len(lights)}")
        for k, (direction, power) in enumerate(lights):
            scene.add(pyrender.DirectionalLight(color=[1.0, 1.0, 1.0], intensity=float(power)),
                      name=f"light{k}", pose=_light_pose(np.asarray(direction, np.float64)))
    v = np.asarray(mesh.vertices, np.float64)
    span = float(np.linalg.norm(v.max(0) - v.min(0)))
    flags = pyrender.RenderFlags.RGBA | (pyrender.RenderFlags.FLAT if not lit else pyrender.RenderFlags.NONE)
    renderer = None
    out = []
    try:
        for name, cam, w2c in views:
            if cam.distorted:
                raise ValueError(f"render_views: view {name!r} has lens distortion; only pinhole is rendered")
            w2c = np.asarray(w2c, np.float64)
            dist = float(np.linalg.norm(-w2c[:3, :3].T @ w2c[:3, 3] - v.mean(0)))
            near = znear if znear is not None else max(1e-4, (dist - span) * 0.5)
            far = zfar if zfar is not None else (dist + span) * 2.0
            # pyrender puts pixel centres at GL (i + 0.5): shift the OpenCV principal point
            camera = pyrender.IntrinsicsCamera(fx=cam.fx, fy=cam.fy, cx=cam.cx + 0.5, cy=cam.cy + 0.5,
                                               znear=near, zfar=far)
            node = scene.add(camera, pose=np.linalg.inv(w2c) @ GL_FROM_CV)
            if renderer is None:
                renderer = pyrender.OffscreenRenderer(cam.width, cam.height)
            renderer.viewport_width, renderer.viewport_height = cam.width, cam.height
            colour, _ = renderer.render(scene, flags=flags)
            scene.remove_node(node)
            c = np.asarray(colour[..., :3], np.float32) / 255.0
            coverage = np.asarray(colour[..., 3], np.float32) / 255.0   # fraction of the 4 samples
            lin = c ** 2.2 if lit else srgb_to_linear(c)
            out.append((lin.astype(np.float32), coverage >= 0.5))
    finally:
        if renderer is not None:
            renderer.delete()
    return out


# --------------------------------------------------------------------------------------------
# Scene folder writer
# --------------------------------------------------------------------------------------------
def _num(x: float) -> str:
    """A float as YAML text that PyYAML reads back as a float (always a '.', never bare 1e-05)."""
    s = f"{float(x):.12f}".rstrip("0")
    return s + "0" if s.endswith(".") else s


def _camera_yaml(cam: Camera) -> list[str]:
    lines = [f"  {cam.id}:", f"    model: {cam.model}", f"    width: {cam.width}", f"    height: {cam.height}"]
    lines += [f"    {k}: {_num(getattr(cam, k))}" for k in ("fx", "fy", "cx", "cy")]
    if cam.model == "brown":
        lines.append(f"    distortion: [{', '.join(_num(c) for c in cam.distortion)}]")
    return lines


def _matrix_yaml(m: np.ndarray) -> str:
    rows = ", ".join("[" + ", ".join(_num(x) for x in row) + "]" for row in m[:3])
    return f"[{rows}]"


def write_mesh_obj(path: Path, mesh: trimesh.Trimesh) -> None:
    """Write positions (and uv, when the mesh has them) as OBJ, atomically; no material file."""
    from trimesh.exchange.obj import export_obj

    has_uv = getattr(mesh.visual, "uv", None) is not None
    text = export_obj(mesh, include_normals=False, include_color=False, include_texture=has_uv,
                      header=None, digits=7)
    if not isinstance(text, str):
        text = text[0]
    text = "\n".join(ln for ln in text.splitlines() if not ln.startswith(("mtllib", "usemtl"))) + "\n"
    write_text(path, text)


def _photo_bytes_to_file(path: Path, rgb8: np.ndarray, image_format: str, jpeg_quality: int) -> None:
    with atomic_path(path) as tmp:
        im = Image.fromarray(rgb8, "RGB")
        if image_format == "jpg":
            im.save(tmp, format="JPEG", quality=jpeg_quality, subsampling=0)
        else:
            im.save(tmp, format="PNG", optimize=False)


def develop_photo(linear: np.ndarray, rng: np.random.Generator, *, exposure_jitter: float,
                  white_balance_jitter: float, noise_sigma: float) -> np.ndarray:
    """Simulated camera: per-photo exposure and white-balance gains, sensor noise, sRGB 8-bit.

    linear: (H, W, 3) float32 linear RGB. Gain = exp(N(0, exposure_jitter)) x per-channel
    exp(N(0, white_balance_jitter)). Noise std = noise_sigma * sqrt((x + 0.01) / 0.51) (shot-noise-like,
    equals noise_sigma at linear level 0.5). Returns (H, W, 3) uint8 sRGB-encoded.
    """
    gain = math.exp(rng.normal(0.0, exposure_jitter)) * np.exp(rng.normal(0.0, white_balance_jitter, 3))
    x = np.asarray(linear, np.float64) * gain
    if noise_sigma > 0:
        x = x + rng.normal(0.0, 1.0, x.shape) * noise_sigma * np.sqrt((np.clip(x, 0, None) + 0.01) / 0.51)
    return to_uint8(linear_to_srgb(np.clip(x, 0.0, 1.0)))


def write_scene(folder: str | Path, scan_mesh: trimesh.Trimesh, photos: Sequence[np.ndarray],
                masks: Sequence[np.ndarray | None], views: Sequence[ViewSpec], holdout: Sequence[bool], *,
                unit: str = "meter", image_format: str = "jpg", jpeg_quality: int = 95,
                exposure_jitter: float = 0.0, white_balance_jitter: float = 0.0, noise_sigma: float = 0.0,
                pose_noise_deg: float = 0.0, pose_noise_m: float = 0.0, seed: int = 0) -> Path:
    """Write a scene folder (docs/contracts.md, section 1) and return the path of its scene.yaml.

    photos: per view (H, W, 3) float32 linear RGB; masks: per view (H, W) bool (True = object) or None.
    Files: mesh.obj (uv kept when present), images/<name>.<jpg|png> (sRGB 8-bit, after
    `develop_photo`), masks/<name>.png (white = object). `pose_noise_*` store poses wrong by exactly
    that angle / shift (random directions, `perturb_pose`) while the photos keep the true ones.
    Deterministic for a seed; every file is written atomically.
    """
    folder = Path(folder)
    if image_format not in ("jpg", "png"):
        raise ValueError(f"image_format must be 'jpg' or 'png', got {image_format!r}")
    if not (len(photos) == len(masks) == len(views) == len(holdout)):
        raise ValueError("photos, masks, views and holdout must have one entry per view")
    write_mesh_obj(folder / "mesh.obj", scan_mesh)
    cameras: dict[str, Camera] = {}
    view_lines: list[str] = []
    for k, ((name, cam, w2c), photo, mask, held) in enumerate(zip(views, photos, masks, holdout)):
        if cameras.setdefault(cam.id, cam) != cam:
            raise ValueError(f"two different cameras share the id {cam.id!r}")
        if photo.shape[:2] != (cam.height, cam.width):
            raise ValueError(f"view {name!r}: photo is {photo.shape[1]}x{photo.shape[0]}, camera is "
                             f"{cam.width}x{cam.height}")
        rng = np.random.default_rng([seed, k])        # one stream per view: views do not shift each other
        rgb8 = develop_photo(photo, rng, exposure_jitter=exposure_jitter,
                             white_balance_jitter=white_balance_jitter, noise_sigma=noise_sigma)
        image_rel = f"images/{name}.{image_format}"
        _photo_bytes_to_file(folder / image_rel, rgb8, image_format, jpeg_quality)
        pose = np.asarray(w2c, np.float64)
        if pose_noise_deg or pose_noise_m:
            pose = perturb_pose(pose, pose_noise_deg, pose_noise_m, np.random.default_rng([seed, k, 1]))
        view_lines += [f"  - name: {name}", f"    image: {image_rel}"]
        if mask is not None:
            mask_rel = f"masks/{name}.png"
            with atomic_path(folder / mask_rel) as tmp:
                Image.fromarray(np.where(mask, 255, 0).astype(np.uint8), "L").save(tmp, format="PNG")
            view_lines.append(f"    mask: {mask_rel}")
        view_lines += [f"    camera: {cam.id}", f"    world_to_camera: {_matrix_yaml(pose)}",
                       f"    holdout: {'true' if held else 'false'}"]
    lines = [f"format: {FORMAT}", "mesh: mesh.obj", f"unit: {unit}", "cameras:"]
    for cam in cameras.values():
        lines += _camera_yaml(cam)
    lines += ["views:"] + view_lines
    path = folder / "scene.yaml"
    write_text(path, "\n".join(lines) + "\n")
    return path
