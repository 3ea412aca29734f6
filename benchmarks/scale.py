"""Scale: G-buffer and fit stages on a generated 1M-face scan with 60 photos at 2048x1536.

    python benchmarks/scale.py [--work DIR] [--faces 1000000] [--small-faces 100000] [--views 60]
                               [--few-views 15] [--width 2048 --height 1536] [--fit-steps 20]
                               [--fit-budget-gb 3] [--fit-threads 1] [--keep]

Generates (once, kept in --work) a bumpy textured sphere at two tessellations and photographs
the fine one with pyrender from `--views` orbit cameras (JPEG). Then, each configuration in its own
child process so that its peak RSS is its own, it times: scene loading (manifest, every photo
decoded once, mesh), the G-buffer stage from a cold cache (written to disk, memory-mapped back:
featuretex/raster/cache.py) and the fit stage (featuretex.fit, `--fit-steps` steps). Configurations:
(small faces, few views), (faces, few views), (faces, views) -> growth with faces and with views.

The fit holds compact per-view data of every fitted view in memory (featuretex/fit/viewdata.py:
photo code values and masks; geometry is recomputed per crop from the G-buffer files) plus mesh
tables shared by all views; the benchmark measures the bytes of one view (and the tables),
projects them to all views, and if that exceeds --fit-budget-gb it fits the largest view subset
within the budget and says so (no run here risks the machine's memory). Issue 7 target: peak RSS <= 6 GB. --fit-threads defaults to 1:
on a shared 2-core machine under load, 2 torch threads made a step 8x slower than 1 (measured).

Last printed line: a JSON object with at least peak_rss_gb, gbuffer_rays_per_s, fit_pixels_per_s.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

os.environ.setdefault("PYOPENGL_PLATFORM", "egl")


def rss_peak_gb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20   # kB on Linux


def rss_now_gb() -> float:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**30


# --------------------------------------------------------------------------------------------
# Scene generation (not timed)
# --------------------------------------------------------------------------------------------
def bumpy_sphere(faces: int, texture):
    """UV sphere of ~`faces` triangles, radius 1 with low-frequency bumps (+-5%), texture kept."""
    from featuretex import synth

    n = max(8, int(round((faces / 4) ** 0.5)))
    m = synth.textured_sphere(1.0, texture, n_lat=n, n_lon=2 * n)
    v = np.asarray(m.vertices)
    theta, phi = np.arccos(np.clip(v[:, 2], -1, 1)), np.arctan2(v[:, 1], v[:, 0])
    m.vertices = v * (1 + 0.05 * np.sin(5 * theta) * np.cos(3 * phi))[:, None]
    return m


def generate(work: Path, faces: int, small_faces: int, views: int, width: int, height: int) -> None:
    """work/scene/: mesh_<faces>.glb for both tessellations, images/*.jpg, scene_<faces>.yaml."""
    from PIL import Image

    from featuretex import synth
    from featuretex.scene.camera import Camera

    folder = work / "scene"
    done = folder / ".complete"
    if done.is_file() and json.loads(done.read_text()) == [faces, small_faces, views, width, height]:
        return
    shutil.rmtree(folder, ignore_errors=True)
    (folder / "images").mkdir(parents=True)
    t = time.perf_counter()
    tex = synth.fine_print_texture(1024, glyph_px=10.0, seed=1)
    fine = bumpy_sphere(faces, tex)
    cam = Camera("cam0", "pinhole", width, height, 1.1 * width, 1.1 * width, (width - 1) / 2, (height - 1) / 2)
    poses = synth.orbit_poses(views, 3.2, [-20.0, 15.0, 45.0], seed=0)
    specs = [(f"v{k:03d}", cam, p) for k, p in enumerate(poses)]
    for k in range(0, views, 10):   # ten at a time: bounded memory for the renders
        for (name, _, _), (lin, _) in zip(specs[k:k + 10], synth.render_views(fine, specs[k:k + 10], lit=False)):
            from featuretex.scene.colour import linear_to_srgb, to_uint8

            Image.fromarray(to_uint8(linear_to_srgb(lin))).save(folder / "images" / f"{name}.jpg", quality=90)
    holdout = [k % 10 == 9 for k in range(views)]
    for n_faces, mesh in ((faces, fine), (small_faces, bumpy_sphere(small_faces, tex))):
        mesh.export(folder / f"mesh_{n_faces}.glb")
        lines = ["format: featuretex-scene/1", f"mesh: mesh_{n_faces}.glb", "unit: meter", "cameras:",
                 "  cam0:", "    model: pinhole", f"    width: {width}", f"    height: {height}",
                 f"    fx: {cam.fx!r}", f"    fy: {cam.fy!r}", f"    cx: {cam.cx!r}", f"    cy: {cam.cy!r}", "views:"]
        for (name, _, p), held in zip(specs, holdout):
            rows = ", ".join("[" + ", ".join(repr(float(x)) for x in r) + "]" for r in p[:3])
            lines += [f"  - name: {name}", f"    image: images/{name}.jpg", "    camera: cam0",
                      f"    world_to_camera: [{rows}]", f"    holdout: {'true' if held else 'false'}"]
        (folder / f"scene_{n_faces}.yaml").write_text("\n".join(lines) + "\n")
    done.write_text(json.dumps([faces, small_faces, views, width, height]))
    print(f"generated {folder} in {time.perf_counter() - t:.0f} s", flush=True)


# --------------------------------------------------------------------------------------------
# One configuration (child process)
# --------------------------------------------------------------------------------------------
def _subset(scene, n_views: int):
    """The scene with its first `n_views` views (fitted and held out in their original mix)."""
    from featuretex.scene.loaded import Scene

    man = dataclasses.replace(scene.manifest, views=scene.manifest.views[:n_views])
    return Scene(manifest=man, mesh=scene.mesh)


def _viewdata_bytes(scene, gbuffers) -> tuple[int, int]:
    """(bytes one fitted view holds in memory, bytes of the mesh tables all views share), measured:
    the nbytes of every array / tensor the fit's ViewData holds. Its G-buffer is a memory map of
    the cache file read per crop with pread, so it is not resident and not counted."""
    from featuretex.fit.viewdata import mesh_tables, prepare_view

    v = scene.manifest.fitted[0]
    tables = mesh_tables(scene.mesh)
    vd = prepare_view(scene, gbuffers[v.name], v, 0, erode_px=2, tables=tables)
    total = 0
    import torch

    for f in dataclasses.fields(vd):   # arrays held directly: the shared tables are counted once, apart
        x = getattr(vd, f.name)
        if isinstance(x, torch.Tensor):
            total += x.element_size() * x.nelement()
        elif isinstance(x, np.ndarray) and not isinstance(x, np.memmap):
            total += x.nbytes
    assert total == vd.resident_nbytes()
    return total, tables.nbytes


def child(scene_yaml: Path, n_views: int, cache: Path, fit_steps: int, fit_budget_gb: float,
          fit_threads: int) -> dict:
    from featuretex.fit.config import FitConfig
    from featuretex.fit.loop import fit_scene
    from featuretex.raster.stage import build_gbuffers
    from featuretex.scene.loaded import load_scene

    out: dict = {}
    t = time.perf_counter()
    scene = _subset(load_scene(scene_yaml), n_views)
    out["load_s"] = round(time.perf_counter() - t, 2)
    out["faces"] = int(len(scene.mesh.faces))
    out["views"] = len(scene.views)
    out["rss_gb_after_load"] = round(rss_now_gb(), 3)

    shutil.rmtree(cache, ignore_errors=True)
    t = time.perf_counter()
    gbuffers, rendered = build_gbuffers(scene, cache, quiet=True)
    gb_s = time.perf_counter() - t
    pixels = sum(int(np.prod(g.shape)) for g in gbuffers.values())
    out.update(gbuffer_s=round(gb_s, 2), gbuffer_rays=pixels, gbuffer_rays_per_s=round(pixels / gb_s),
               gbuffer_cache_gb=round(sum(p.stat().st_size for p in cache.glob("*.npy")) / 2**30, 3),
               peak_rss_gb_gbuffer=round(rss_peak_gb(), 3), rendered=rendered)

    per_view, shared = _viewdata_bytes(scene, gbuffers)
    n_fit_all = len(scene.manifest.fitted) + len(scene.manifest.heldout)
    h, w = next(iter(gbuffers.values())).shape
    out["fit_viewdata_mb_per_view"] = round(per_view / 2**20, 1)
    out["fit_viewdata_bytes_per_pixel"] = round(per_view / (h * w), 2)
    out["fit_mesh_tables_mb"] = round(shared / 2**20, 1)
    out["fit_viewdata_gb_all_views"] = round((per_view * n_fit_all + shared) / 2**30, 2)
    n_fit = min(len(scene.views), max(3, int((fit_budget_gb * 2**30 - shared) // per_view)))
    fit_scene_ = _subset(scene, n_fit) if n_fit < len(scene.views) else scene
    out["fit_views_used"] = len(fit_scene_.views)
    cfg = FitConfig(steps=fit_steps, eval_every=10 * fit_steps, checkpoint_every=10 * fit_steps, threads=fit_threads)
    out["fit_threads"] = fit_threads
    run = cache.parent / "fit-run"
    shutil.rmtree(run, ignore_errors=True)
    tex = np.full((1024, 1024, 3), 0.4, np.float32)
    t = time.perf_counter()
    res = fit_scene(fit_scene_, gbuffers, tex, None, cfg, run, seed=0, quiet=True, config_hash="scale")
    out["fit_s"] = round(time.perf_counter() - t, 2)
    out["fit_timings"] = res.timings
    train_pixels = fit_steps * cfg.batch * cfg.crop ** 2
    out["fit_pixels_per_s"] = round(train_pixels / max(res.timings["train_s"], 1e-9))
    out["peak_rss_gb"] = round(rss_peak_gb(), 3)
    shutil.rmtree(run, ignore_errors=True)
    return out


def run_child(args, scene_yaml: Path, n_views: int) -> dict:
    cmd = [sys.executable, __file__, "--child", str(scene_yaml), "--child-views", str(n_views),
           "--work", str(args.work), "--fit-steps", str(args.fit_steps), "--fit-budget-gb", str(args.fit_budget_gb),
           "--fit-threads", str(args.fit_threads)]
    p = subprocess.run(cmd, capture_output=True, text=True)
    if p.returncode != 0:
        raise SystemExit(f"child failed ({scene_yaml.name}, {n_views} views):\n{p.stderr[-3000:]}")
    r = json.loads(p.stdout.strip().splitlines()[-1])
    print(f"{r['faces']} faces, {r['views']} views: {json.dumps(r)}", flush=True)
    return r


def _ratio(a: float, b: float) -> float:
    return round(a / b, 2) if b else float("nan")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--work", type=Path, default=Path("/tmp/featuretex-scale"))
    ap.add_argument("--faces", type=int, default=1_000_000)
    ap.add_argument("--small-faces", type=int, default=100_000)
    ap.add_argument("--views", type=int, default=60)
    ap.add_argument("--few-views", type=int, default=15)
    ap.add_argument("--width", type=int, default=2048)
    ap.add_argument("--height", type=int, default=1536)
    ap.add_argument("--fit-steps", type=int, default=20)
    ap.add_argument("--fit-budget-gb", type=float, default=3.0)
    ap.add_argument("--fit-threads", type=int, default=1, help="torch threads of the fit (0 = all cores)")
    ap.add_argument("--keep", action="store_true", help="keep the generated scene and caches")
    ap.add_argument("--child", type=Path, help=argparse.SUPPRESS)
    ap.add_argument("--child-views", type=int, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child, args.child_views, args.work / "cache" / "gbuffer", args.fit_steps,
                               args.fit_budget_gb, args.fit_threads)))
        return 0
    generate(args.work, args.faces, args.small_faces, args.views, args.width, args.height)
    scene = args.work / "scene"
    small = run_child(args, scene / f"scene_{args.small_faces}.yaml", args.few_views)
    few = run_child(args, scene / f"scene_{args.faces}.yaml", args.few_views)
    full = run_child(args, scene / f"scene_{args.faces}.yaml", args.views)
    growth = {
        f"faces_x{_ratio(few['faces'], small['faces'])}": {
            "gbuffer_time": _ratio(few["gbuffer_s"], small["gbuffer_s"]),
            "peak_rss": _ratio(few["peak_rss_gb"], small["peak_rss_gb"]),
            "load_time": _ratio(few["load_s"], small["load_s"])},
        f"views_x{_ratio(full['views'], few['views'])}": {
            "gbuffer_time": _ratio(full["gbuffer_s"], few["gbuffer_s"]),
            "peak_rss_gbuffer_stage": _ratio(full["peak_rss_gb_gbuffer"], few["peak_rss_gb_gbuffer"]),
            "load_time": _ratio(full["load_s"], few["load_s"])},
    }
    if not args.keep:
        shutil.rmtree(args.work / "cache", ignore_errors=True)
    summary = {"peak_rss_gb": full["peak_rss_gb"], "peak_rss_gb_gbuffer_stage": full["peak_rss_gb_gbuffer"],
               "gbuffer_rays_per_s": full["gbuffer_rays_per_s"], "fit_pixels_per_s": full["fit_pixels_per_s"],
               "fit_views_used": full["fit_views_used"], "fit_viewdata_gb_all_views": full["fit_viewdata_gb_all_views"],
               "faces": full["faces"], "views": full["views"], "image": [args.width, args.height],
               "growth": growth, "configs": {"small_few": small, "large_few": few, "large_all": full}}
    print(json.dumps(summary))
    return 0


if __name__ == "__main__":
    sys.exit(main())
