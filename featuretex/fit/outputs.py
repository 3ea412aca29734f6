"""The fit's state and files: the loop state a checkpoint carries (history included), the
checkpoint's payload, the finished fit's outputs (fit/model.pt, fit/history.json,
fit/corrections.npz) and reading them back."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch

from featuretex.atomic import atomic_path, write_json
from featuretex.fit import checkpoint as ckpt
from featuretex.fit.sampler import CropSampler
from featuretex.model.scene_model import SceneModel
from featuretex.scene.loaded import Scene


@dataclass
class FitResult:
    model: SceneModel
    history: dict[str, Any]
    corrections: dict[str, np.ndarray]
    timings: dict[str, float]
    stopped: str = "steps"     # how the fit ended: "steps" | "plateau" (also when loaded from its files)
    loaded: bool = False       # read from the run folder's fit files, not fitted in this run
    stats: dict[str, float] = field(default_factory=dict)  # this session: steps, pixels fitted / rendered


@dataclass
class LoopState:
    step: int = 0
    elapsed_s: float = 0.0              # wall time of earlier sessions of this fit (resume)
    best_loss: float = math.inf
    bad_evals: int = 0
    window: list[float] = field(default_factory=list)   # losses since the last eval
    history: dict[str, Any] = field(default_factory=lambda: {
        "step": [], "loss": [], "heldout_psnr": [], "heldout_ssim": [], "elapsed_s": [],
        "train": {"step": [], "loss": []}})

    def to_dict(self) -> dict[str, Any]:
        return {"step": self.step, "elapsed_s": self.elapsed_s, "best_loss": self.best_loss,
                "bad_evals": self.bad_evals, "window": list(self.window), "history": self.history}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "LoopState":
        return cls(step=int(d["step"]), elapsed_s=float(d["elapsed_s"]), best_loss=float(d["best_loss"]),
                   bad_evals=int(d["bad_evals"]), window=[float(x) for x in d["window"]], history=d["history"])


def checkpoint_payload(key: str, model: SceneModel, opt: torch.optim.Optimizer, sampler: CropSampler,
                        state: LoopState) -> dict[str, Any]:
    return {"format": ckpt.FORMAT, "hash": key, "meta": model.meta(), "model": model.state_dict(),
            "optim": opt.state_dict(), "sampler": sampler.state_dict(), "torch_rng": torch.get_rng_state(),
            "loop": state.to_dict()}


def corrections_arrays(model: SceneModel, scene: Scene) -> dict[str, np.ndarray]:
    """Per scene view (fitted and held out): colour matrix, bias, alignment field, flags."""
    corr = model.corrections
    assert corr is not None
    fitted = corr.to_numpy()
    gh, gw = corr.align.shape[2:]
    names = [v.name for v in scene.views]
    V = len(names)
    M = np.tile(np.eye(3, dtype=np.float32), (V, 1, 1))
    b = np.zeros((V, 3), np.float32)
    a = np.zeros((V, gh, gw, 2), np.float32)
    is_fit = np.zeros(V, bool)
    for i, n in enumerate(names):
        j = model.view_index(n)
        if j is not None:
            M[i], b[i], a[i], is_fit[i] = fitted["colour_matrix"][j], fitted["colour_bias"][j], \
                fitted["alignment_px"][j], True
    sizes = np.array([[v.camera.width, v.camera.height] for v in scene.views], np.int64)
    return {"views": np.array(names), "fitted": is_fit, "reference": np.array(corr.names[corr.reference]),
            "colour_matrix": M, "colour_bias": b, "alignment_px": a, "image_size": sizes}


def write_outputs(fit_dir: Path, key: str, model: SceneModel, scene: Scene, history: dict[str, Any],
                   timings: dict[str, float]) -> dict[str, np.ndarray]:
    corr = corrections_arrays(model, scene)
    with atomic_path(fit_dir / "corrections.npz") as tmp:
        np.savez_compressed(tmp, **corr)
    write_json(fit_dir / "history.json", {**history, "timings_s": timings})
    ckpt.save(fit_dir / "model.pt", {"format": ckpt.FORMAT, "hash": key, "meta": model.meta(),
                                     "model": model.state_dict(), "timings_s": timings})
    return corr


def load_fitted(fit_dir: Path, saved: dict[str, Any]) -> FitResult:
    """The finished fit from its files; raises (DAMAGED or RuntimeError) when one does not read back."""
    model = SceneModel.from_meta(saved["meta"])
    model.load_state_dict(saved["model"])
    model.eval()
    hist = json.loads((fit_dir / "history.json").read_text())
    timings = dict(saved.get("timings_s", hist.pop("timings_s", {})))
    hist.pop("timings_s", None)
    with np.load(fit_dir / "corrections.npz") as z:
        corr = {k: z[k] for k in z.files}
    return FitResult(model=model, history=hist, corrections=corr, timings=timings,
                     stopped=str(hist.get("stopped", "steps")), loaded=True)
