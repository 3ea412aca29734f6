"""A validated scene ready to work on: manifest, mesh, and photos decoded on first use."""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import numpy as np

from featuretex.errors import input_error
from featuretex.scene.images import SWAPS_AXES, load_mask, load_photo, load_photo_levels, verify_image
from featuretex.scene.manifest import Manifest, View, read_manifest
from featuretex.scene.mesh import SceneMesh, load_mesh
from featuretex.scene.up import UpAxis, scene_up

PHOTO_CACHE_BYTES = 1 << 30  # decoded photos kept in memory; older ones are decoded again when asked for


@dataclass
class Scene:
    """manifest: the views the run works on. After featuretex.working, their photos, masks and
    cameras are the working images (cropped, reduced) and `source` holds the manifest as written."""

    manifest: Manifest
    mesh: SceneMesh
    photo_cache_bytes: int = PHOTO_CACHE_BYTES
    source: Manifest | None = None          # the scene as written, when `manifest` is derived from it
    content_key: str | None = None          # content hash of a derived scene (else the manifest's)
    _photos: OrderedDict[str, np.ndarray] = field(default_factory=OrderedDict, repr=False)

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
        """(H, W, 3) float32 linear-light photo; the most recently used ones stay decoded in memory."""
        if view.name in self._photos:
            self._photos.move_to_end(view.name)
            return self._photos[view.name]
        size = (view.camera.width, view.camera.height)
        a = load_photo(view.image, self.file, view.name, size)
        self._photos[view.name] = a
        while len(self._photos) > 1 and sum(p.nbytes for p in self._photos.values()) > self.photo_cache_bytes:
            self._photos.popitem(last=False)
        return a

    def photo_levels(self, view: View) -> np.ndarray:
        """(H, W, 3) uint8/uint16 sRGB code values of the photo, decoded anew (not cached): a third
        (8-bit) of the float photo's bytes; images.linear_table(dtype)[levels] == photo(view)."""
        return load_photo_levels(view.image, self.file, view.name, (view.camera.width, view.camera.height))

    def photo_mask(self, view: View) -> np.ndarray | None:
        """(H, W) bool object mask from the mask file, or None when the view has none."""
        return load_mask(view.mask, self.file, view.name, (view.camera.width, view.camera.height))

    @property
    def original(self) -> Manifest:
        """The manifest as written (original photos and cameras)."""
        return self.source or self.manifest

    @cached_property
    def up(self) -> UpAxis:
        """The scene's up direction: given in scene.yaml, or estimated from the cameras."""
        return scene_up(self.original)

    @cached_property
    def content_hash(self) -> str:
        return self.content_key or self.manifest.content_hash()


def load_scene(path: str | Path) -> Scene:
    """Read, validate and load a scene (mesh decoded; photos on demand). Raises InputError.

    Every photo and mask is decoded once here, so a damaged file stops the run before any work.
    """
    man = read_manifest(path)
    check_images(man)
    mesh = load_mesh(man.mesh, str(man.path))
    check_views_see_mesh(man, mesh)
    return Scene(manifest=man, mesh=mesh)


def _header_size(p: Path) -> tuple[int, int] | None:
    """(width, height) of the upright image from its header alone, or None if Pillow cannot tell."""
    from PIL import Image

    try:
        with Image.open(p) as im:
            w, h = im.size
            orient = im.getexif().get(0x0112, 1)
    except Exception:  # decode_image reports what is wrong with the file
        return None
    return (h, w) if orient in SWAPS_AXES else (w, h)


def check_images(man: Manifest) -> None:
    """Every photo and mask decodes, is upright the camera's width x height, and a mask is not empty.

    The header is read first, so an image far larger than its camera is refused before decoding.
    Photos are decoded and dropped (pixels are read again when a stage asks for them); masks are
    small and are checked for content too.
    """
    file = str(man.path)
    for v in man.views:
        want = (v.camera.width, v.camera.height)
        for fld, p in (("image", v.image), ("mask", v.mask)):
            if p is None:
                continue
            size = _header_size(p)
            if size is not None and size != want:
                raise input_error(file, f"'{p.name}' is {size[0]}x{size[1]} (upright) but camera "
                                  f"'{v.camera.id}' is {want[0]}x{want[1]}", view=v.name, field=fld,
                                  hint="fix the camera's width/height or use the original photo")
            if fld == "image":
                verify_image(p, file, v.name, fld)
            else:
                load_mask(p, file, v.name, want)


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
                              view=v.name, field="world_to_camera",
                              hint="check the pose, and that the mesh and the poses use the same unit")
