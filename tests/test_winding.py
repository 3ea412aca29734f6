"""Inside-out meshes are found from what the cameras see and worked with outward.

Reference outside the project: trimesh's signed volume of a closed mesh, positive when the faces
wind outwards (counter-clockwise seen from outside) and negative when the mesh is inside out."""

from __future__ import annotations

import numpy as np
import trimesh

from featuretex import synth
from featuretex.scene.camera import Camera
from featuretex.scene.loaded import load_scene
from featuretex.scene.mesh import SceneMesh, smooth_normals
from featuretex.scene.winding import facing_share, orient_outward


def _scene(tmp_path, inside_out: bool = False):
    mesh = synth.textured_sphere(0.1, synth.checker_texture(64, 4), n_lat=12, n_lon=24)
    cam = Camera(id="cam0", model="pinhole", width=64, height=48, fx=60.0, fy=60.0, cx=31.5, cy=23.5)
    views = [(f"v{i:02d}", cam, p) for i, p in enumerate(synth.orbit_poses(4, 0.5, [20.0]))]
    shots = synth.render_views(mesh, views, lit=False)
    if inside_out:                                   # the file as an exporter that winds inwards writes it
        mesh = mesh.copy()
        mesh.faces = np.ascontiguousarray(mesh.faces[:, ::-1])
    path = synth.write_scene(tmp_path / "s", mesh, [s[0] for s in shots], [s[1] for s in shots], views,
                             [False, False, False, True], image_format="png")
    return load_scene(path)


def _volume(m: SceneMesh) -> float:
    t = trimesh.Trimesh(m.vertices, m.faces, process=True)   # merged along UV seams: closed
    assert t.is_watertight
    return float(t.volume)


def test_inside_out_mesh_is_found_and_turned(tmp_path):
    scene = _scene(tmp_path)
    good = scene.mesh
    assert _volume(good) > 0                                   # reference: outward winding
    share, hits = facing_share(good, scene.views)
    assert hits > 200 and share > 0.99
    faces = np.ascontiguousarray(good.faces[:, ::-1])
    inside_out = SceneMesh(good.vertices, faces, good.uv, smooth_normals(good.vertices, faces))
    assert _volume(inside_out) < 0                             # reference: inside out
    assert facing_share(inside_out, scene.views)[0] < 0.01
    turned, warnings = orient_outward(inside_out, scene.views, "s.yaml")
    assert _volume(turned) > 0 and len(warnings) == 1 and "inside out" in warnings[0]
    np.testing.assert_array_equal(turned.faces, good.faces)
    np.testing.assert_allclose(turned.normals, good.normals, atol=1e-12)
    same, none = orient_outward(good, scene.views, "s.yaml")
    assert same is good and none == []


def test_mixed_winding_is_said_and_kept(tmp_path):
    scene = _scene(tmp_path)
    good = scene.mesh
    faces = good.faces.copy()
    centres = good.vertices[faces].mean(1)
    half = centres[:, 0] > 0.03                                # one side of the sphere wound inwards
    faces[half] = faces[half][:, ::-1]
    mixed = SceneMesh(good.vertices, faces, good.uv, smooth_normals(good.vertices, faces))
    share, _ = facing_share(mixed, scene.views)
    assert 0.5 < share < 0.9
    same, warnings = orient_outward(mixed, scene.views, "s.yaml")
    assert same is mixed and len(warnings) == 1 and "mixed" in warnings[0]


def test_loading_an_inside_out_scene_works_outward_and_says_so(tmp_path):
    scene = _scene(tmp_path / "out", inside_out=True)
    assert _volume(scene.mesh) > 0                             # reference: trimesh's signed volume
    assert any("inside out" in w for w in scene.warnings)
    plain = _scene(tmp_path / "in")
    assert not any("inside out" in w or "mixed" in w for w in plain.warnings)
    np.testing.assert_allclose(scene.mesh.normals, plain.mesh.normals, atol=1e-6)
