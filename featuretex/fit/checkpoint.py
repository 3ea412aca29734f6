"""Checkpoints and the final model file, written atomically and read with weights_only=True."""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict
from pathlib import Path
from typing import Any

import torch

from featuretex.atomic import atomic_path
from featuretex.errors import input_error
from featuretex.fit.config import FitConfig
from featuretex.model.decoders import resolve_precision

FORMAT = "featuretex-fit/1"


RESULT_NEUTRAL = frozenset({"geometry_cache_gb"})   # fit knobs that change speed or memory, never values


def result_knobs(cfg: FitConfig) -> dict[str, Any]:
    """The fit knobs a result depends on (what keys a finished or resumable fit); precision "auto"
    as what it resolves to on this machine."""
    knobs = {k: v for k, v in asdict(cfg).items() if k not in RESULT_NEUTRAL}
    knobs["precision"] = resolve_precision(cfg.precision)
    return knobs


def fit_hash(config_hash: str, cfg: FitConfig, seed: int) -> str:
    """Key of a fit: the caller's scene/config hash plus every fit knob that can change its result, and the seed."""
    text = json.dumps({"format": FORMAT, "outer": config_hash, "fit": result_knobs(cfg), "seed": seed}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def save(path: Path, payload: dict[str, Any]) -> None:
    with atomic_path(path) as tmp:
        torch.save(payload, tmp)


def load(path: Path) -> dict[str, Any]:
    """Read a checkpoint or model file; a damaged file is an InputError naming it."""
    try:
        return torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:  # torch raises several types for truncated or foreign files
        raise input_error(str(path), f"cannot read this fit file ({type(e).__name__}: {e})",
                          hint="delete it to fit from scratch") from None


def load_checkpoint(path: Path, expected_hash: str) -> dict[str, Any]:
    """The checkpoint at `path`; InputError when it belongs to another scene or configuration."""
    ck = load(path)
    if ck.get("format") != FORMAT or ck.get("hash") != expected_hash:
        raise input_error(str(path), "this checkpoint was made for a different scene, fit configuration or "
                          f"seed (its key {ck.get('hash')!r}, this run's {expected_hash!r}); refusing to resume",
                          field="fit", hint="restore the earlier settings to resume, or delete the file "
                          "(or choose another out=) to fit from scratch")
    return ck
