"""G-buffers against outside references: pyrender's OpenGL depth, trimesh's own ray caster."""

import numpy as np
import pyrender
import trimesh
from trimesh.ray.ray_triangle import RayMeshIntersector

from featuretex.raster.cache import load_or_render
from featuretex.raster.embree import EmbreeRasteriser
from featuretex.raster.gbuffer import GBUFFER_DTYPE
from featuretex.raster.uvspace import rasterise_uv
from featuretex.scene.camera import Camera
from featuretex.scene.manifest import View
from featuretex.scene.mesh import SceneMesh, make_atlas, smooth_normals


def scene_mesh(tm: trimesh.Trimesh) -> SceneMesh:
    v, f, uv = make_atlas(np.asarray(tm.vertices), np.asarray(tm.faces), 256)
    return SceneMesh(v, f, uv, smooth_normals(v, f))


def look_at(eye, target=(0, 0, 0), up=(0, 1, 0)) -> np.ndarray:
    """world_to_camera (4x4) with OpenCV axes (+x right, +y down, +z forward)."""
    eye, target, up = map(np.asarray, (eye, target, up))
    z = target - eye
    z = z / np.linalg.norm(z)
    x = np.cross(z, up)
    x /= np.linalg.norm(x)
    y = np.cross(z, x)
    R = np.stack([x, y, z])
    T = np.eye(4)
    T[:3, :3] = R
    T[:3, 3] = -R @ eye
    return T


def random_mesh(rng) -> trimesh.Trimesh:
    parts = [trimesh.creation.icosphere(3, radius=rng.uniform(0.3, 0.6)),
             trimesh.creation.box(extents=rng.uniform(0.2, 0.8, 3)),
             trimesh.creation.capsule(height=0.5, radius=0.15)]
    for p in parts:
        p.apply_translation(rng.uniform(-0.4, 0.4, 3))
    m = trimesh.util.concatenate(parts)
    m.vertices += rng.normal(0, 0.002, m.vertices.shape)
    return m


def test_depth_matches_pyrender():
    rng = np.random.default_rng(3)
    tm = random_mesh(rng)
    mesh = scene_mesh(tm)
    cam = Camera("c", "pinhole", 320, 240, 300.0, 310.0, 160.3, 118.7)
    w2c = look_at([0.3, -0.5, 2.5])
    gb = EmbreeRasteriser(mesh).render(View("v", None, None, cam, w2c))
    # reference: pyrender OpenGL depth. GL pixel centres sit at +0.5 (docs/contracts.md, section 6), GL camera looks down -z
    scene = pyrender.Scene()
    scene.add(pyrender.Mesh.from_trimesh(trimesh.Trimesh(mesh.vertices, mesh.faces, process=False)))
    gl_cam = pyrender.IntrinsicsCamera(cam.fx, cam.fy, cam.cx + 0.5, cam.cy + 0.5, znear=0.05, zfar=20.0)
    cv_to_gl = np.diag([1.0, -1.0, -1.0, 1.0])
    scene.add(gl_cam, pose=np.linalg.inv(w2c) @ cv_to_gl)
    r = pyrender.OffscreenRenderer(cam.width, cam.height)
    try:
        depth_gl = r.render(scene, flags=pyrender.RenderFlags.DEPTH_ONLY | pyrender.RenderFlags.SKIP_CULL_FACES)
    finally:
        r.delete()
    both = (gb["tri"] >= 0) & (depth_gl > 0)
    # away from silhouettes, where 4x multisampling mixes depths
    from scipy import ndimage
    interior = ndimage.binary_erosion(both, iterations=2)
    # ... and away from occlusion edges inside the object (depth jumps > 8 cm within 2 pixels)
    z = gb["depth"].astype(np.float64)
    jump = ndimage.maximum_filter(z, size=5) - ndimage.minimum_filter(np.where(z > 0, z, np.inf), size=5)
    interior &= jump < 0.08
    assert interior.sum() > 3000
    # pyrender reads back a multisampled depth buffer, whose value comes from a sample up to half a
    # pixel from the centre (4x MSAA sample positions), so allow half a pixel of the local depth slope
    gy, gx = np.gradient(gb["depth"].astype(np.float64))
    slack = 0.5 * (np.abs(gx) + np.abs(gy)) + 2e-3  # + depth-buffer quantisation (24-bit, near 0.05)
    err = np.abs(gb["depth"] - depth_gl)
    assert np.mean(err[interior] <= slack[interior]) > 0.99
    assert np.median(err[interior]) < 5e-3
    # coverage agrees except on silhouette pixels
    assert ((gb["tri"] >= 0) != (depth_gl > 0)).mean() < 0.01


def test_triangle_ids_match_trimesh_ray_triangle():
    rng = np.random.default_rng(4)
    for _ in range(3):
        tm = random_mesh(rng)
        mesh = scene_mesh(tm)
        cam = Camera("c", "brown", 96, 72, 90.0, 90.0, 47.5, 35.5, (-0.1, 0.01, 0.001, -0.001, 0.0))
        w2c = look_at(rng.normal(0, 1, 3) * 0.3 + [0, 0, 2.4])
        view = View("v", None, None, cam, w2c)
        gb = EmbreeRasteriser(mesh).render(view)
        # reference: trimesh's pure-numpy ray/triangle intersector (no Embree) on the same rays
        dirs = cam.pixel_rays() @ w2c[:3, :3]
        origins = np.broadcast_to(view.centre, dirs.shape)
        ref = RayMeshIntersector(trimesh.Trimesh(mesh.vertices, mesh.faces, process=False))
        tri_ref = np.full(len(dirs), -1)
        idx_tri, idx_ray, loc = ref.intersects_id(origins, dirs, multiple_hits=True, return_locations=True)
        dist = np.linalg.norm(loc - origins[idx_ray], axis=1)
        best = np.full(len(dirs), np.inf)
        for t, r, d in zip(idx_tri, idx_ray, dist):
            if d < best[r]:
                best[r], tri_ref[r] = d, t
        ours = gb["tri"].ravel()
        # equal ids, or (on shared edges) a different triangle at the same depth
        same = ours == tri_ref
        assert same.mean() > 0.995
        # barycentrics reproduce the hit point of the reference caster
        hit = same & (ours >= 0)
        pos = gb.reshape(-1)
        p = (mesh.vertices[mesh.faces[ours[hit]]] * np.stack(
            [1 - pos["b1"][hit] - pos["b2"][hit], pos["b1"][hit], pos["b2"][hit]], 1)[..., None]).sum(1)
        ref_p = origins[hit] + dirs[hit] / np.linalg.norm(dirs[hit], axis=1, keepdims=True) * best[hit][:, None]
        assert np.abs(p - ref_p).max() < 1e-4


def test_compact_storage_and_cache(tmp_path):
    tm = trimesh.creation.icosphere(3)
    mesh = scene_mesh(tm)
    cam = Camera("c", "pinhole", 64, 48, 60.0, 60.0, 31.5, 23.5)
    view = View("v", None, None, cam, look_at([0, 0, 3.0]))
    assert GBUFFER_DTYPE.itemsize == 16  # the cache's record size (docs/contracts.md, section 3)

    class Counting(EmbreeRasteriser):
        calls = 0

        def render(self, v):
            Counting.calls += 1
            return super().render(v)

    backend = Counting(mesh)
    a, cached_a = load_or_render(tmp_path, backend, mesh, view)
    b, cached_b = load_or_render(tmp_path, backend, mesh, view)
    assert (cached_a, cached_b, Counting.calls) == (False, True, 1)
    assert np.array_equal(np.asarray(a.data), np.asarray(b.data))
    assert isinstance(b.data, np.memmap)
    # a moved camera is a different cache entry
    moved = View("v", None, None, cam, look_at([0, 0.1, 3.0]))
    _, cached_c = load_or_render(tmp_path, backend, mesh, moved)
    assert not cached_c


def test_uv_buffer_points_lie_on_their_triangles():
    mesh = scene_mesh(trimesh.creation.icosphere(3))
    tb = rasterise_uv(mesh, 128)
    assert 0.3 < tb.valid.mean() < 0.95
    # texel centre uv reproduced by the barycentric interpolation of the triangle's uvs (exactness)
    from featuretex.raster.gbuffer import interpolate
    from featuretex.raster.uvspace import texel_uv
    uv = interpolate(tb.tri, tb.b1, tb.b2, mesh.faces, mesh.uv)
    assert np.abs(uv[tb.valid] - texel_uv(128)[tb.valid]).max() < 1e-5
    # and the points sit on the unit sphere surface (icosphere radius 1, facets within 2 %)
    r = np.linalg.norm(tb.position[tb.valid], axis=1)
    assert r.min() > 0.98 and r.max() < 1.0001
