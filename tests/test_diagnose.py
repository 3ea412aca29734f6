"""The diagnosis on synthetic scans whose defects are known (photos rendered by pyrender, an
independent OpenGL renderer; true offsets measured with trimesh's own non-Embree ray caster).

Scenes: a textured plane with exact geometry (ready), the same with the scan dented (fix-geometry),
a sphere photographed only from above (rescan), and the exact plane with a 16 x 16 texture
(refine-texture). Each verdict must hold for two seeds (texture, camera placement and noise).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import trimesh
from PIL import Image
from scipy import ndimage

from featuretex import synth
from featuretex.bake.baseline import bake_baseline
from featuretex.diagnose import DiagnoseConfig, diagnose, write_outputs
from featuretex.diagnose.classify import GEOMETRY, OFF
from featuretex.diagnose.palette import COLOURS
from featuretex.raster.stage import build_gbuffers
from featuretex.raster.uvspace import rasterise_uv
from featuretex.scene.camera import Camera
from featuretex.scene.loaded import load_scene

SIZE = (160, 120)      # photo width, height
VIEWS = 12
T = 128                # texture size
DENT = dict(centre=(0.0, 0.0, 0.0), radius=0.45, depth=0.06)
CFG = DiagnoseConfig(max_grid=128)


# --------------------------------------------------------------------------------------------
# scenes
# --------------------------------------------------------------------------------------------
def noise_texture(size: int, seed: int) -> Image.Image:
    """Band-limited colour noise at three scales (sRGB bytes): detail for NCC to lock on to."""
    rng = np.random.default_rng(seed)
    img = np.zeros((size, size, 3))
    for sigma, amp in ((2.5, 1.0), (6.0, 1.0), (16.0, 0.8)):
        n = ndimage.gaussian_filter(rng.normal(size=(size, size, 3)), sigma=(sigma, sigma, 0), mode="wrap")
        img += amp * n / n.std()
    return Image.fromarray(np.clip((0.5 + 0.12 * img) * 255, 0, 255).astype(np.uint8), "RGB")


def cameras(seed: int, elevations: tuple[float, ...]) -> list:
    w, h = SIZE
    cam = Camera("cam0", "pinhole", w, h, 1.1 * w, 1.1 * w, (w - 1) / 2, (h - 1) / 2)
    poses = synth.orbit_poses(VIEWS, 3.2, list(elevations), seed=seed)
    return [(f"v{k:03d}", cam, p) for k, p in enumerate(poses)]


def plane(seed: int) -> trimesh.Trimesh:
    """2 x 2 plane at z = 0 whose UVs fill [0.1, 0.9]^2 (so the texture has off-surface texels)."""
    m = synth.textured_plane(2.0, noise_texture(256, seed), subdivisions=64)
    m.visual.uv = 0.1 + 0.8 * np.asarray(m.visual.uv)
    return m


def render_scene(folder: Path, photographed: trimesh.Trimesh, scan: trimesh.Trimesh, views: list,
                 seed: int) -> Path:
    shots = synth.render_views(photographed, views, lit=False, texture_filter="mipmap")
    return synth.write_scene(folder, scan, [s[0] for s in shots], [s[1] for s in shots], views,
                             [False] * len(views), image_format="png", seed=seed, noise_sigma=0.01,
                             exposure_jitter=0.1, white_balance_jitter=0.03)


@dataclass
class Built:
    scene: object
    gbuffers: dict
    photographed: trimesh.Trimesh
    folder: Path


_CACHE: dict = {}


def build(kind: str, seed: int, tmp_path_factory) -> Built:
    key = (kind, seed)
    if key not in _CACHE:
        folder = tmp_path_factory.mktemp(f"{kind}{seed}")
        if kind == "sphere":       # photographed only from above: the lower part is never seen
            truth = synth.textured_sphere(1.0, noise_texture(256, seed), n_lat=32, n_lon=64)
            scan, views = truth, cameras(seed, (35.0, 60.0))
        else:
            flat = plane(seed)
            dented = synth.dent(flat, DENT["centre"], DENT["radius"], DENT["depth"], normal=(0, 0, 1))
            truth, scan = {"exact": (flat, flat), "dent": (flat, dented), "bump": (dented, flat)}[kind]
            views = cameras(seed, (35.0, 55.0))
        path = render_scene(folder, truth, scan, views, seed)
        scene = load_scene(path)
        gbuffers, _ = build_gbuffers(scene, folder / "cache", quiet=True)
        _CACHE[key] = Built(scene, gbuffers, truth, folder)
    return _CACHE[key]


_RUNS: dict = {}


def run(b: Built, size: int = T, oracle: bool = False):
    """(Diagnosis, texels) of a built scene, baseline-baked at `size`; oracle: with the perfect
    alignment fields of `oracle_fields`. Cached: several tests look at the same diagnosis."""
    key = (id(b), size, oracle)
    if key not in _RUNS:
        texels = rasterise_uv(b.scene.mesh, size)
        tex = bake_baseline(b.scene, b.gbuffers, texels).texture_lin
        corr = oracle_fields(b) if oracle else None
        _RUNS[key] = (diagnose(b.scene, b.gbuffers, texels, tex, CFG, corrections=corr), texels)
    return _RUNS[key]


def true_offset(b: Built, pos: np.ndarray, nrm: np.ndarray) -> np.ndarray:
    """(N,) signed distance along the scan normal from scan points to the photographed surface,
    by trimesh's pure-numpy ray caster (not Embree); NaN where the line misses."""
    from trimesh.ray.ray_triangle import RayMeshIntersector

    reach = 0.5
    caster = RayMeshIntersector(b.photographed)
    loc, ray, _ = caster.intersects_location(pos - reach * nrm, nrm, multiple_hits=True)
    out = np.full(len(pos), np.nan)
    t = np.einsum("ij,ij->i", loc - pos[ray], nrm[ray])
    for r, v in zip(ray, t):
        if np.isnan(out[r]) or abs(v) < abs(out[r]):
            out[r] = v
    return out


# --------------------------------------------------------------------------------------------
# verdicts
# --------------------------------------------------------------------------------------------
SEEDS = [0, 1]


@pytest.mark.parametrize("seed", SEEDS)
def test_exact_geometry_is_ready(seed, tmp_path_factory):
    dg, _ = run(build("exact", seed, tmp_path_factory))
    assert dg.verdict == "ready", (dg.areas, dg.reasons)
    assert dg.areas["geometry_limited"] < CFG.fix_geometry_area


@pytest.mark.parametrize("seed", SEEDS)
def test_dented_scan_needs_geometry_fix(seed, tmp_path_factory):
    b = build("dent", seed, tmp_path_factory)
    dg, texels = run(b)
    assert dg.verdict == "fix-geometry", (dg.areas, dg.reasons)
    # the dent's area: where trimesh's ray caster finds the photos' surface > 1/4 depth away
    v = texels.valid
    truth = true_offset(b, texels.position[v].astype(np.float64), texels.normal[v].astype(np.float64))
    dent_area = np.mean(truth > 0.25 * DENT["depth"])
    found = np.mean(dg.cls[v] == GEOMETRY)
    assert 0.5 * dent_area < found < 2.0 * dent_area, (found, dent_area)
    assert any("off the photographed surface" in r and "outside the mesh" in r for r in dg.reasons), dg.reasons


@pytest.mark.parametrize("seed", SEEDS)
def test_unphotographed_half_means_rescan(seed, tmp_path_factory):
    b = build("sphere", seed, tmp_path_factory)
    dg, texels = run(b)
    assert dg.verdict == "rescan", (dg.areas, dg.reasons)
    # independent check: texels that face away from every camera centre by more than the usable
    # angle (cos < min_cos, computed here directly from the poses) must come out uncovered
    v = texels.valid
    p, n = texels.position[v].astype(np.float64), texels.normal[v].astype(np.float64)
    centres = np.array([view.centre for view in b.scene.manifest.fitted])
    to_cam = centres[None] - p[:, None]
    cos = np.einsum("nk,nvk->nv", n, to_cam) / np.linalg.norm(to_cam, axis=2)
    unseen = (cos >= CFG.min_cos).sum(axis=1) < CFG.min_views
    # surface share: a longitude-latitude texel's area is proportional to cos(latitude) = hypot(x, y)
    w = np.hypot(p[:, 0], p[:, 1])
    share = w[unseen].sum() / w.sum()
    assert share > CFG.rescan_uncovered
    assert np.all(dg.coverage[v][unseen] < CFG.min_views)
    assert dg.areas["uncovered"] >= 0.9 * share


@pytest.mark.parametrize("seed", SEEDS)
def test_tiny_texture_means_refine(seed, tmp_path_factory):
    dg, _ = run(build("exact", seed, tmp_path_factory), size=16)
    assert dg.verdict == "refine-texture", (dg.areas, dg.reasons)
    assert dg.areas["texture_limited"] > 0.5
    assert any("larger texture" in r for r in dg.reasons), dg.reasons


# --------------------------------------------------------------------------------------------
# displacement
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind, sign", [("dent", +1), ("bump", -1)])
def test_displacement_at_dent_matches_true_depth(kind, sign, tmp_path_factory):
    b = build(kind, 0, tmp_path_factory)
    dg, texels = run(b)
    v = texels.valid
    truth = np.full(v.shape, np.nan)
    truth[v] = true_offset(b, texels.position[v].astype(np.float64), texels.normal[v].astype(np.float64))
    core = np.abs(truth) > 0.9 * DENT["depth"]          # the dent's middle, by the ray caster
    assert core.sum() > 20
    # scan dented in -> photos see the surface outside (+); object dented, scan flat -> inside (-)
    assert np.all(np.sign(truth[core]) == sign)
    est = dg.displacement[core]
    assert np.isfinite(est).mean() > 0.8
    err = np.nanmedian(np.abs(est - truth[core])) / DENT["depth"]
    assert err < 0.25, err
    assert np.all(np.sign(est[np.isfinite(est)]) == sign)


@pytest.mark.parametrize("seed", SEEDS)
def test_flat_exact_surface_has_no_displacement(seed, tmp_path_factory):
    dg, texels = run(build("exact", seed, tmp_path_factory))
    d = dg.displacement[texels.valid]
    half = dg.figures["sweep_half_range"]
    # |displacement| < 10 % of the sweep range wherever it is not NaN
    assert np.all(np.abs(d[np.isfinite(d)]) < 0.1 * half)


# --------------------------------------------------------------------------------------------
# with the fit's alignment fields
# --------------------------------------------------------------------------------------------
_ORACLE: dict = {}


def oracle_fields(b: Built) -> dict:
    if id(b) not in _ORACLE:
        _ORACLE[id(b)] = _oracle_fields(b)
    return _ORACLE[id(b)]


def _oracle_fields(b: Built, nodes: tuple[int, int] = (13, 17)) -> dict:
    """What a perfect fit's alignment fields would be: per view, at each node pixel, the photo
    position of the surface point that the scan shows there, projected by OpenCV's projectPoints.
    The scan point is found by trimesh's ray caster along the pixel's ray, the photographed point
    along the scan normal from it."""
    import cv2
    from trimesh.ray.ray_triangle import RayMeshIntersector

    scan_tm = trimesh.Trimesh(b.scene.mesh.vertices, b.scene.mesh.faces, process=False)
    caster = RayMeshIntersector(scan_tm)
    h, w = nodes
    fields, names = [], []
    for view in b.scene.manifest.fitted:
        cam = view.camera
        gx, gy = np.meshgrid(np.linspace(0, cam.width - 1, w), np.linspace(0, cam.height - 1, h))
        px = np.stack([gx.ravel(), gy.ravel()], 1)
        dirs = cam.unproject(px) @ view.R            # world directions (rows: R^T d)
        dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
        origins = np.broadcast_to(view.centre, dirs.shape)
        loc, ray, tri = caster.intersects_location(origins, dirs, multiple_hits=False)
        field = np.zeros((h * w, 2))
        if len(ray):
            n = scan_tm.face_normals[tri]
            n = n * np.sign(np.einsum("ij,ij->i", n, view.centre - loc))[:, None]
            t = true_offset(b, loc, n)
            ok = np.isfinite(t)
            p_true = loc[ok] + t[ok, None] * n[ok]
            rvec, _ = cv2.Rodrigues(view.R)
            img, _ = cv2.projectPoints(p_true, rvec, view.t, cam.K, None)
            field[ray[ok]] = img[:, 0, :] - px[ray[ok]]
        fields.append(field.reshape(h, w, 2))
        names.append(view.name)
    V = len(names)
    return {"views": np.array(names), "colour_matrix": np.broadcast_to(np.eye(3), (V, 3, 3)).copy(),
            "colour_bias": np.zeros((V, 3)), "alignment_px": np.array(fields, np.float32)}


def test_alignment_fields_locate_the_dent(tmp_path_factory):
    b = build("dent", 0, tmp_path_factory)
    dg, texels = run(b, oracle=True)
    assert dg.verdict == "fix-geometry", dg.reasons
    assert dg.figures["used_alignment"]
    v = texels.valid
    truth = np.full(v.shape, np.nan)
    truth[v] = true_offset(b, texels.position[v].astype(np.float64), texels.normal[v].astype(np.float64))
    core = truth > 0.9 * DENT["depth"]
    # the normal offset solved from the fields alone agrees with the ray caster within 25 %
    est = dg.extra["align_offset"][core]
    assert np.isfinite(est).mean() > 0.8
    assert np.nanmedian(np.abs(est - truth[core])) < 0.25 * DENT["depth"]
    # far from the dent the fields are zero, and so is the misplacement
    far = v & (np.abs(truth) < 1e-4)
    assert np.nanpercentile(dg.extra["align_misplacement"][far], 95) < 0.1 * DENT["depth"]


def test_zero_fields_keep_exact_scene_ready(tmp_path_factory):
    b = build("exact", 0, tmp_path_factory)
    assert np.abs(oracle_fields(b)["alignment_px"]).max() < 0.05   # exact geometry: the fields vanish
    dg, _ = run(b, oracle=True)
    assert dg.verdict == "ready", dg.reasons


# --------------------------------------------------------------------------------------------
# outputs
# --------------------------------------------------------------------------------------------
def test_outputs_are_readable_and_consistent(tmp_path_factory, tmp_path):
    b = build("dent", 0, tmp_path_factory)
    dg, texels = run(b)
    paths = write_outputs(tmp_path, dg, b.scene, texels)
    z = np.load(paths["npz"])
    for k in ("geometry", "texture", "coverage", "displacement"):
        assert z[k].shape == (T, T) and z[k].dtype == np.float32
        assert np.all(np.isnan(z[k][~texels.valid]))               # NaN where unknown (off surface)
    on = texels.valid
    assert np.all((z["geometry"][on] >= 0) & (z["geometry"][on] <= 1))
    assert np.all((z["cls"] == OFF) == ~on)
    img = Image.open(paths["png"])          # Pillow reads it back; the legend sits below the map
    assert img.width >= 512 and img.height > img.width
    ply = trimesh.load(paths["ply"], process=False)   # trimesh's PLY reader as the outside reader
    assert len(ply.vertices) == len(b.scene.mesh.vertices)
    colours = np.asarray(ply.visual.vertex_colors)[:, :3].astype(int)
    centre = np.argmin(np.linalg.norm(b.scene.mesh.vertices - np.array(DENT["centre"]), axis=1))
    assert np.abs(colours[centre] - np.array(COLOURS[GEOMETRY])).max() <= 2
    far = np.argmax(np.linalg.norm(b.scene.mesh.vertices, axis=1))
    assert np.abs(colours[far] - np.array(COLOURS[GEOMETRY])).max() > 40
    # the outputs are written atomically: no temporary files are left behind
    assert sorted(p.name for p in tmp_path.iterdir()) == ["diagnosis.ply", "error_map.npz", "error_map.png"]
