"""A validated scene ready to work on: manifest, mesh, and photos decoded on first use."""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import numpy as np

from featuretex.errors import input_error
from featuretex.scene.images import load_mask, load_photo
from featuretex.scene.manifest import Manifest, View, check_image_sizes, read_manifest
from featuretex.scene.mesh import SceneMesh, load_mesh


@dataclass
class Scene:
    manifest: Manifest
    mesh: SceneMesh
    _photos: dict[str, np.ndarray] = field(default_factory=dict, repr=False)

    @property
    def file(self) -> str:
        return str(self.manifest.path)

    @property
    def views(self) -> tuple[View, ...]:
        return self.manifest.views

    def view(self, name: str) -> View:
        for v in self.manifest.views:
            if v.name == name:
                return v
        raise KeyError(name)

    def photo(self, view: View) -> np.ndarray:
        """(H, W, 3) float32 linear-light photo (decoded once, then kept)."""
        if view.name not in self._photos:
            size = (view.camera.width, view.camera.height)
            self._photos[view.name] = load_photo(view.image, self.file, view.name, size)
        return self._photos[view.name]

    def photo_mask(self, view: View) -> np.ndarray | None:
        """(H, W) bool object mask from the mask file, or None when the view has none."""
        return load_mask(view.mask, self.file, view.name, (view.camera.width, view.camera.height))

    @cached_property
    def content_hash(self) -> str:
        return self.manifest.content_hash()


def load_scene(path: str | Path) -> Scene:
    """Read, validate and load a scene (mesh decoded; photos on demand). Raises InputError."""
    man = read_manifest(path)
    check_image_sizes(man)
    mesh = load_mesh(man.mesh, str(man.path))
    check_views_see_mesh(man, mesh)
    return Scene(manifest=man, mesh=mesh)


def check_views_see_mesh(man: Manifest, mesh: SceneMesh) -> None:
    """Each camera must have the mesh in front of it and (partly) inside its image."""
    pts = mesh.vertices
    sample = pts[:: max(1, len(pts) // 5000)]
    for v in man.views:
        pc = v.to_camera(sample)
        front = pc[:, 2] > 1e-9
        if not front.any():
            raise input_error(str(man.path), "the mesh lies entirely behind this camera", view=v.name,
                              field="world_to_camera",
                              hint="world_to_camera maps world to camera coords with +z forward; is it inverted?")
        px = v.camera.project(pc[front])
        inside = ((px[:, 0] > -0.5) & (px[:, 0] < v.camera.width - 0.5)
                  & (px[:, 1] > -0.5) & (px[:, 1] < v.camera.height - 0.5))
        if not inside.any():
            raise input_error(str(man.path), "no part of the mesh projects into this image (camera looks away)",
                              view=v.name, field="world_to_camera")
