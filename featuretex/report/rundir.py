"""What a run directory holds, read leniently: the report shows what exists and names what is missing.

Every reader here returns None (or an empty value) for a file that is absent or unreadable and
records why in `RunDir.problems`, so one broken artefact never stops the report.
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from featuretex.scene.manifest import view_file_stem

log = logging.getLogger("featuretex")

METHODS = ("baseline", "baked", "neural")         # held-out renders, in the order they are shown
METHOD_LABELS = {"photo": "Photo (held out)", "baseline": "Classical bake", "baked": "Delivered texture",
                 "neural": "Neural render", "touchup": "Touched-up model"}

# artefact -> (stage that writes it, what the reader loses without it)
ARTEFACTS: dict[str, tuple[str, str]] = {
    "summary.json": ("score", "verdict, reasons and every figure"),
    "texture.png": ("bake", "the baked texture"),
    "baseline_texture.png": ("baseline bake", "the classical texture"),
    "model.glb": ("export", "the 3D view and the pictures of the model"),
    "error_map.npz": ("diagnose", "the error map and its worst regions"),
    "error_map.png": ("diagnose", "the painted error map"),
    "fit/history.json": ("fit", "the loss and held-out PSNR curves"),
    ".hydra/config.yaml": ("command line", "the exact configuration"),
}


@dataclass
class RunDir:
    """The parsed contents of one run directory (all paths absolute)."""

    path: Path
    summary: dict[str, Any] = field(default_factory=dict)
    history: dict[str, Any] = field(default_factory=dict)
    config_text: str = ""
    overrides: list[str] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)   # unreadable files, one line each

    def has(self, rel: str) -> bool:
        return (self.path / rel).is_file()

    def missing(self) -> list[tuple[str, str, str]]:
        """(file, stage, what is lost) for every expected artefact that is absent."""
        return [(f, st, lost) for f, (st, lost) in ARTEFACTS.items() if not self.has(f)]

    @property
    def verdict(self) -> str | None:
        v = self.summary.get("verdict")
        return str(v) if v else None

    @property
    def heldout_views(self) -> list[str]:
        """Held-out view names, from the per-view scores or else from the images in heldout/."""
        names: dict[str, None] = {}
        for per_view in self.summary.get("heldout_per_view", {}).values():
            names.update(dict.fromkeys(per_view))
        if not names and (self.path / "heldout").is_dir():
            for p in sorted((self.path / "heldout").glob("*_photo.png")):
                names[p.name[: -len("_photo.png")]] = None
        return list(names)

    def heldout_image(self, view: str, method: str) -> Path | None:
        p = self.path / "heldout" / f"{view_file_stem(view)}_{method}.png"
        return p if p.is_file() else None

    def view_scores(self, method: str, view: str) -> dict[str, float | None]:
        return self.summary.get("heldout_per_view", {}).get(method, {}).get(view, {}) or {}

    def method_scores(self, method: str) -> dict[str, float | None]:
        scores = (self.summary.get("heldout") or {}).get(method)
        return scores if isinstance(scores, dict) else {}

    @property
    def methods(self) -> list[str]:
        """Scored methods: the three every run has, then any other in summary.json's `heldout`
        (a touched-up model, ...), in the order written."""
        extra = [m for m, v in (self.summary.get("heldout") or {}).items()
                 if m not in METHODS and isinstance(v, dict) and "psnr" in v]
        return [*METHODS, *extra]

    def config_value(self, dotted: str, default: Any) -> Any:
        """A value of .hydra/config.yaml by its dotted key, or `default`."""
        try:
            node: Any = yaml.safe_load(self.config_text) if self.config_text else {}
            for k in dotted.split("."):
                node = node[k]
            return node
        except (KeyError, TypeError, yaml.YAMLError):
            return default


def _read_json(path: Path, problems: list[str]) -> dict[str, Any]:
    if not path.is_file():
        return {}
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as e:
        problems.append(f"{path.name}: unreadable ({e})")
        return {}
    if not isinstance(data, dict):
        problems.append(f"{path.name}: not a JSON object")
        return {}
    return data


def read_run_dir(run_dir: Path) -> RunDir:
    """Parse summary.json, fit/history.json and .hydra/{config,overrides}.yaml of `run_dir`."""
    run = RunDir(path=Path(run_dir).resolve())
    run.summary = _read_json(run.path / "summary.json", run.problems)
    run.history = _read_json(run.path / "fit" / "history.json", run.problems)
    cfg = run.path / ".hydra" / "config.yaml"
    if cfg.is_file():
        run.config_text = cfg.read_text(encoding="utf-8", errors="replace")
    ovr = run.path / ".hydra" / "overrides.yaml"
    if ovr.is_file():
        try:
            loaded = yaml.safe_load(ovr.read_text(encoding="utf-8"))
            run.overrides = [str(o) for o in loaded] if isinstance(loaded, list) else []
        except yaml.YAMLError as e:
            run.problems.append(f"overrides.yaml: unreadable ({e})")
    for p in run.problems:
        log.warning("report: %s", p)
    return run
