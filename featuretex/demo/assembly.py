"""Assembling the demo: render the true jug from turntable cameras, write the scan as a scene folder
(perturbed poses, exposure and white-balance jitter, JPEG photos) and the ground truth beside it."""

from __future__ import annotations

from dataclasses import asdict
from pathlib import Path

import numpy as np
from PIL import Image

from featuretex.atomic import atomic_path, write_json
from featuretex.demo.config import DemoConfig
from featuretex.demo.painting import paint_albedo
from featuretex.demo.scan import NOISE_RMS, NOISE_WAVELENGTHS, scan_jug, surface_point
from featuretex.demo.geometry import true_jug
from featuretex.demo.truth import defect_faces, face_error
from featuretex.scene.camera import Camera
from featuretex.scene.mesh import load_mesh, make_atlas
from featuretex.synth import orbit_poses, render_views, textured_mesh, write_scene


def demo_views(cfg: DemoConfig) -> list[tuple[str, Camera, np.ndarray]]:
    cam = Camera("turntable", "pinhole", cfg.width, cfg.height, cfg.focal, cfg.focal,
                 (cfg.width - 1) / 2, (cfg.height - 1) / 2)
    poses = orbit_poses(cfg.n_views, cfg.distance, cfg.elevations_deg, target=(0.0, 0.0, 0.105), seed=cfg.seed)
    return [(f"v{k:03d}", cam, p) for k, p in enumerate(poses)]


def _jsonable(x):
    if isinstance(x, dict):
        return {k: _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return [_jsonable(v) for v in x.tolist()]
    if isinstance(x, (np.floating, float)):
        return round(float(x), 9)
    if isinstance(x, np.integer):
        return int(x)
    return x


def build_demo(out: str | Path, cfg: DemoConfig = DemoConfig(), log=print) -> Path:
    """Generate the demo into out/scene and out/ground_truth; return out/scene/scene.yaml."""
    out = Path(out)
    scene_dir, truth_dir = out / "scene", out / "ground_truth"
    log("painting the albedo")
    albedo = Image.fromarray(paint_albedo(cfg.texture, cfg.seed), "RGB")
    truth = true_jug(cfg, albedo)
    views = demo_views(cfg)
    log(f"rendering {len(views)} views of the true jug ({len(truth.faces)} faces)")
    shots = render_views(truth, views, lit=True, light_seed=cfg.light_seed, background=cfg.background,
                         roughness=cfg.roughness)

    log("building the scan")
    scan, info = scan_jug(cfg)
    av, af, auv = make_atlas(np.asarray(scan.vertices), np.asarray(scan.faces), cfg.atlas)
    scan_uv = textured_mesh(av, af, auv, None)
    holdout = [k % cfg.holdout_every == 2 for k in range(len(views))]
    manifest = write_scene(scene_dir, scan_uv, [s[0] for s in shots], [s[1] for s in shots], views, holdout,
                           unit="meter", image_format="jpg", jpeg_quality=95,
                           exposure_jitter=cfg.exposure_jitter, white_balance_jitter=cfg.white_balance_jitter,
                           noise_sigma=cfg.noise_sigma, pose_noise_deg=cfg.pose_noise_deg,
                           pose_noise_m=cfg.pose_noise_m, seed=cfg.seed)

    log("measuring the scan against the truth")
    loaded = load_mesh(scene_dir / "mesh.obj", str(manifest))   # the faces exactly as featuretex reads them
    fe = face_error(loaded.vertices, loaded.faces, truth)
    faces = defect_faces(loaded.vertices, loaded.faces, info)
    truth_dir.mkdir(parents=True, exist_ok=True)
    with atomic_path(truth_dir / "true_mesh.ply") as tmp:
        truth.export(tmp, file_type="ply")
    with atomic_path(truth_dir / "albedo.png") as tmp:
        albedo.save(tmp, format="PNG")
    with atomic_path(truth_dir / "face_error.npy") as tmp:
        np.save(tmp, fe)
    d, h, s = info["dent"], info["hole"], info["smoothed"]
    defects = {
        "unit": "meter",
        "sign_convention": "face_error[f] = t with centroid_f + t * n_f on the true surface (n_f the scan "
                           "face's outward normal); positive = the scan lies inside the true surface; "
                           "NaN where undefined (no surface across, or the normal grazes a step)",
        "defects": [
            {"type": "dent", "centre": d["centre"], "normal": d["normal"], "radius": d["radius"],
             "depth": d["depth"], "profile": "depth * (1 - (r / radius)^2)^2 along the normals",
             "faces": faces["dent"]},
            {"type": "smoothed_detail", "what": "raised band flattened over a sector", "centre":
             surface_point(float(np.mean(s["theta_deg"])), float(np.mean(s["z"])))[0],
             "theta_deg": s["theta_deg"], "z": s["z"], "radius": None, "depth": s["depth"],
             "faces": faces["smoothed_detail"]},
            {"type": "hole", "centre": h["centre"], "normal": h["normal"], "radius": h["radius"], "depth": None,
             "faces_removed": h["faces_removed"], "faces": faces["hole"]},
            {"type": "noise", "what": "low-frequency displacement along the normals", "rms": NOISE_RMS,
             "wavelengths": NOISE_WAVELENGTHS, "centre": None, "radius": None, "depth": None, "faces": "all"},
        ],
        "pose_noise": {"angle_deg": cfg.pose_noise_deg, "shift": cfg.pose_noise_m},
        "scan_faces": int(len(loaded.faces)),
        "true_faces": int(len(truth.faces)),
        "config": asdict(cfg),
    }
    write_json(truth_dir / "defects.json", _jsonable(defects))
    write_json(truth_dir / "true_poses.json",
               _jsonable({"note": "world_to_camera used to render each photo (the manifest's are perturbed)",
                          "views": {name: w2c for name, _, w2c in views}}))
    return manifest
