"""One report being drawn: the run folder, and what several sections draw from (the model, the
error map and its regions, the six views, the details to look closer at), each computed on first
use. Anything that cannot be computed is None, with the reason in `why`, so a section can say
what is missing instead of failing."""

from __future__ import annotations

import logging
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np

from featuretex.report import closer, errormap, errorviews, stills
from featuretex.report.rundir import RunDir

log = logging.getLogger("featuretex")

VIEWS_FILE = "error_map_views.png"
PREVIEW_FILE = "preview.png"              # a small still of the delivered model, for batch.html


@dataclass
class ErrorMap:
    """error_map.npz as the report draws it."""

    fields: errormap.ErrorFields
    unit: str
    regions: list[errormap.Region]          # summary.json's numbered regions, in its order
    texture: np.ndarray                     # (T, T, 3) uint8 painted map, islands padded


class Page:
    """A run folder being turned into report.html."""

    def __init__(self, run: RunDir):
        self.run = run
        self.scripts: list[str] = []      # inline scripts, in page order (each hashed into the policy)
        self.why: dict[str, str] = {}

    def script(self, text: str) -> None:
        if text not in self.scripts:
            self.scripts.append(text)

    def _attempt(self, name: str, make) -> Any:
        try:
            return make()
        except Exception as e:   # a damaged or partial run: the sections say what is missing
            self.why[name] = f"{type(e).__name__}: {e}"
            log.warning("report: no %s (%s)", name, self.why[name])
            return None

    @cached_property
    def model(self) -> stills.Model | None:
        if not self.run.has("model.glb"):
            self.why["model"] = "the export stage has not written model.glb"
            return None
        return self._attempt("model", lambda: stills.load_model(self.run.path / "model.glb"))

    @cached_property
    def caster(self) -> stills.Caster | None:
        return None if self.model is None else self._attempt("caster", lambda: stills.Caster(self.model))

    @cached_property
    def error(self) -> ErrorMap | None:
        if not self.run.has("error_map.npz"):
            self.why["error"] = "the diagnose stage has not written error_map.npz"
            return None
        return self._attempt("error", self._error)

    def _error(self) -> ErrorMap:
        fields = errormap.load_fields(self.run.path / "error_map.npz")
        regions = errormap.regions_of(self.run.summary.get("regions") or [], fields.region)
        return ErrorMap(fields, str(self.run.summary.get("unit", "")), regions, errormap.surface_texture(fields))

    @cached_property
    def error_views(self) -> errorviews.ErrorViews | None:
        """The six views of the error map on the model (also written to error_map_views.png)."""
        if self.caster is None or self.error is None:
            self.why.setdefault("error_views", self.why.get("model") or self.why.get("error") or "")
            return None

        def make() -> errorviews.ErrorViews:
            views = errorviews.render(self.caster, self.error.texture, self.error.fields.region)
            errorviews.write_png(self.run.path / VIEWS_FILE, views, f"verdict: {self.run.verdict or 'none'}",
                                 [self.areas_line()])
            return views
        return self._attempt("error_views", make)

    def areas_line(self) -> str:
        a = self.run.summary.get("areas") or {}
        try:
            hidden = float(a.get("uncovered_hidden") or 0.0)
            return (f"uncovered {100 * (float(a['uncovered']) - hidden):.1f} %   cavity {100 * hidden:.1f} %   "
                    f"geometry-limited {100 * float(a['geometry_limited']):.1f} %   "
                    f"texture-limited {100 * float(a['texture_limited']):.1f} % of the surface")
        except (KeyError, TypeError, ValueError):
            return "shares of the surface: not recorded in summary.json"

    @cached_property
    def scene_views(self) -> dict | None:
        """The views by name as the run worked on them (the images in heldout/ are working images:
        summary.json `working_resolution` gives each one's crop and size), when scene.yaml is still
        readable."""
        scene = self.run.summary.get("scene")
        if not scene:
            return None

        def read() -> dict:
            import dataclasses

            from featuretex.scene.manifest import read_manifest
            from featuretex.scene.resample import Window, working_camera

            working = self.run.summary.get("working_resolution") or {}
            views = {}
            for v in read_manifest(scene).views:
                w = working.get(v.name)
                if w:
                    v = dataclasses.replace(v, camera=working_camera(v.camera, Window(*w["crop"], *w["size"])))
                views[v.name] = v
            return views
        return self._attempt("scene", read)

    @cached_property
    def details(self) -> list[closer.Detail]:
        """Where to look closer: up to three places, largest change first."""
        held = self.run.path / "heldout"
        renders = {v: (held / f"{v}_baseline.png", held / f"{v}_baked.png") for v in self.run.heldout_views
                   if (held / f"{v}_baseline.png").is_file() and (held / f"{v}_baked.png").is_file()}
        locate = None
        if self.caster is not None and self.scene_views:
            locate = closer.locator(self.scene_views, self.caster)
        apart = 0.15 * self.model.mesh.extent if self.model is not None else 0.0
        return self._attempt("details", lambda: closer.choose(renders, locate=locate, apart=apart)) or []

    def preview(self, size: int = 240) -> np.ndarray | None:
        """(size, size, 3) uint8: the delivered model from the front right, unlit (texture.png)."""
        if self.caster is None or not self.run.has("texture.png"):
            return None

        def make() -> np.ndarray:
            from PIL import Image

            with Image.open(self.run.path / "texture.png") as im:
                tex = np.asarray(im.convert("RGB"))
            towards, up = stills.three_quarter()
            return stills.paint(self.caster.cast(towards, up, size), tex, nearest=False)
        return self._attempt("preview", make)
