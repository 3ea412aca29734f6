"""G-buffer throughput against the raw Embree call, and the demo's G-buffers (time, peak memory).

    python benchmarks/gbuffer.py [--faces N] [--width W --height H] [--repeats R] [--no-demo]

1. One generated mesh, one camera: featuretex's G-buffer backend (`EmbreeRasteriser.render`: ray
   generation through the camera model, the cast, barycentrics and depth into the 16-byte record)
   against trimesh's `RayMeshIntersector.intersects_id` (embreex) and embreex's own `scene.run`
   on the *same* rays, side by side in this run (best of R, interleaved; acceleration structures
   built before timing). `ratio_to_raw` = our rays/s / intersects_id's rays/s (target >= 0.7).
2. The demo scene: every view's G-buffer from a cold cache, in a child process so its peak RSS
   is its own. Target: <= 15 s on 2 cores.

Last printed line: a JSON object.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

os.environ.setdefault("PYOPENGL_PLATFORM", "egl")

from featuretex import synth  # noqa: E402
from featuretex.raster.embree import EmbreeRasteriser  # noqa: E402
from featuretex.scene.camera import Camera  # noqa: E402
from featuretex.scene.manifest import View  # noqa: E402
from featuretex.scene.mesh import SceneMesh, smooth_normals  # noqa: E402


def sphere_mesh(faces: int) -> SceneMesh:
    """A UV sphere of radius 1 with about `faces` triangles (2 n^2 for n latitude rows)."""
    n = max(8, int(round((faces / 4) ** 0.5)))
    tm = synth.textured_sphere(1.0, None, n_lat=n, n_lon=2 * n)
    v = np.asarray(tm.vertices, np.float64)
    f = np.asarray(tm.faces, np.int64)
    return SceneMesh(vertices=v, faces=f, uv=np.asarray(tm.visual.uv, np.float64), normals=smooth_normals(v, f))


def front_view(width: int, height: int, distance: float = 2.6) -> View:
    """A pinhole camera at `distance` looking at the origin; the sphere fills most of the frame."""
    f = 0.9 * width
    cam = Camera("bench", "pinhole", width, height, f, f, (width - 1) / 2, (height - 1) / 2)
    return View(name="bench", image=Path("none.png"), mask=None, camera=cam,
                world_to_camera=synth.look_at([distance, 0.3, 0.4], [0, 0, 0]))


def rss_peak_gb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20   # ru_maxrss is in kB on Linux


def throughput(faces: int, width: int, height: int, repeats: int) -> dict:
    import trimesh
    from trimesh.ray.ray_pyembree import RayMeshIntersector

    mesh = sphere_mesh(faces)
    view = front_view(width, height)
    ours = EmbreeRasteriser(mesh)
    dirs = view.camera.pixel_rays() @ view.R
    origins = np.broadcast_to(view.centre, dirs.shape)
    o32, d32 = np.ascontiguousarray(origins, np.float32), np.ascontiguousarray(dirs, np.float32)
    raw = RayMeshIntersector(trimesh.Trimesh(mesh.vertices, mesh.faces, process=False))
    raw.intersects_id(o32[:16], d32[:16], multiple_hits=False)   # builds its Embree scene
    n = len(dirs)
    best = {"ours": np.inf, "intersects_id": np.inf, "embreex_run": np.inf}
    for _ in range(repeats):
        t = time.perf_counter()
        gb = ours.render(view)
        best["ours"] = min(best["ours"], time.perf_counter() - t)
        t = time.perf_counter()
        tri = raw.intersects_id(origins, dirs, multiple_hits=False)
        best["intersects_id"] = min(best["intersects_id"], time.perf_counter() - t)
        t = time.perf_counter()
        ours.scene.run(o32, d32, output=0)
        best["embreex_run"] = min(best["embreex_run"], time.perf_counter() - t)
    covered = gb["tri"].ravel() >= 0
    agree = float(np.mean(covered == _hit_mask(tri, n)))   # same rays, same answer?
    return {"faces": int(len(mesh.faces)), "rays": int(n), "hit_fraction": round(float(covered.mean()), 4),
            "seconds": {k: round(v, 4) for k, v in best.items()},
            "rays_per_s": round(n / best["ours"]), "raw_rays_per_s": round(n / best["intersects_id"]),
            "embreex_rays_per_s": round(n / best["embreex_run"]),
            "ratio_to_raw": round(best["intersects_id"] / best["ours"], 3),
            "ratio_to_embreex_run": round(best["embreex_run"] / best["ours"], 3),
            "coverage_agreement": round(agree, 6)}


def _hit_mask(tri_result, n: int) -> np.ndarray:
    """intersects_id returns (triangle ids, ray ids) of hits; -> (n,) bool per ray."""
    m = np.zeros(n, bool)
    m[np.asarray(tri_result[1], np.int64)] = True
    return m


def demo_child() -> dict:
    """Run in a fresh process: load the demo, build every G-buffer from a cold cache."""
    from featuretex.demo import ensure_demo_scene
    from featuretex.raster.stage import build_gbuffers
    from featuretex.scene.loaded import load_scene

    scene = load_scene(ensure_demo_scene())
    rss_loaded = rss_peak_gb()
    with tempfile.TemporaryDirectory(prefix="featuretex-bench-gb-") as d:
        t = time.perf_counter()
        gbs, rendered = build_gbuffers(scene, Path(d), quiet=True)
        seconds = time.perf_counter() - t
        pixels = sum(int(np.prod(g.shape)) for g in gbs.values())
        nbytes = sum(g.data.nbytes for g in gbs.values())
    return {"views": len(gbs), "rendered": rendered, "seconds": round(seconds, 3),
            "pixels": pixels, "bytes_per_pixel": round(nbytes / pixels, 2),
            "rays_per_s": round(pixels / seconds), "peak_rss_gb": round(rss_peak_gb(), 3),
            "peak_rss_gb_after_load": round(rss_loaded, 3), "faces": int(len(scene.mesh.faces))}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--faces", type=int, default=200_000)
    ap.add_argument("--width", type=int, default=1024)
    ap.add_argument("--height", type=int, default=768)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--no-demo", action="store_true")
    ap.add_argument("--demo-child", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.demo_child:
        print(json.dumps(demo_child()))
        return 0
    result = throughput(args.faces, args.width, args.height, args.repeats)
    print(f"throughput: {json.dumps(result)}")
    if not args.no_demo:
        p = subprocess.run([sys.executable, __file__, "--demo-child"], capture_output=True, text=True)
        if p.returncode != 0:
            print(p.stderr, file=sys.stderr)
            return p.returncode
        result["demo"] = json.loads(p.stdout.strip().splitlines()[-1])
        print(f"demo: {json.dumps(result['demo'])}")
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    sys.exit(main())
