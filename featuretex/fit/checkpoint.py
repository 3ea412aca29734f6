"""Checkpoints and the final model file, written atomically and read with weights_only=True."""

from __future__ import annotations

import errno
import hashlib
import json
import os
from dataclasses import asdict
from pathlib import Path
from typing import Any

import torch

from featuretex.atomic import atomic_path
from featuretex.errors import input_error
from featuretex.fit.config import FitConfig
from featuretex.model.decoders import resolve_precision
from featuretex.settings import shown
from featuretex.stages import discard

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


# what each kind of fit file must hold to be used
CHECKPOINT_KEYS = ("format", "hash", "meta", "model", "optim", "sampler", "torch_rng", "loop")
MODEL_KEYS = ("format", "hash", "meta", "model")


def save(path: Path, payload: dict[str, Any]) -> None:
    """Write atomically. torch writes through the Python file object, so a full disk raises the
    OSError it is (torch's own file writer reports it as a RuntimeError without an errno)."""
    with atomic_path(path) as tmp:
        try:
            with open(tmp, "wb") as f:
                torch.save(payload, f)
        except OSError as e:   # named after the file it was meant to be
            raise OSError(e.errno, e.strerror or str(e), str(path)) from None
        except RuntimeError as e:
            full = os.statvfs(tmp.parent).f_bavail == 0
            raise OSError(errno.ENOSPC if full else errno.EIO, os.strerror(errno.ENOSPC) if full else
                          " ".join(str(e).split())[:160], str(path)) from None


def load(path: Path, keys: tuple[str, ...] = MODEL_KEYS) -> dict[str, Any] | None:
    """A checkpoint or model file, read with tensor-only deserialisation; None (said in one line)
    when it does not read back or is not a featuretex fit file: the fit is computed again."""
    try:
        data = torch.load(path, map_location="cpu", weights_only=True)
        if not isinstance(data, dict) or any(k not in data for k in keys) or data["format"] != FORMAT:
            raise ValueError("not a featuretex fit file")
        return data
    except Exception as e:  # noqa: BLE001 (torch raises many types for truncated or foreign files)
        discard("a fit file", path, e)
        return None


def load_checkpoint(path: Path, expected_hash: str) -> dict[str, Any] | None:
    """The checkpoint at `path` (None when damaged); InputError when it belongs to another scene or
    configuration: resuming would mix two fits, and starting afresh would throw work away."""
    ck = load(path, CHECKPOINT_KEYS)
    if ck is not None and ck["hash"] != expected_hash:
        raise input_error(str(path), "this checkpoint was made for a different scene, fit configuration or "
                          f"seed (its key {shown(ck['hash'])}, this run's {expected_hash!r}); refusing to resume",
                          field="fit", hint="restore the earlier settings to resume, or delete the file "
                          "(or choose another out=) to fit from scratch")
    return ck
