"""A validated scene ready to work on: manifest, mesh, and photos decoded on first use."""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import numpy as np

from featuretex.errors import input_error
from featuretex.scene.images import (decode_levels, header_size, load_mask, load_photo, load_photo_levels,
                                     verify_image)
from featuretex.scene.manifest import Manifest, View, read_manifest
from featuretex.scene.mesh import SceneMesh, load_mesh
from featuretex.scene.sanity import IMAGE_HINT, check_scene, coarse_mask, photo_is_mask, two_level_light
from featuretex.scene.up import UpAxis, scene_up
from featuretex.scene.winding import orient_outward

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
    warnings: list[str] = field(default_factory=list)   # suspicious evidence found on loading, one line each
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

    Every photo and mask is decoded once here, so a damaged file stops the run before any work, and
    the scene as a whole is checked (featuretex.scene.sanity) before any expensive stage. A mesh the
    cameras see inside out is worked with its faces reversed (featuretex.scene.winding), with a
    warning.
    """
    man = read_manifest(path)
    masks, light = check_images(man)
    mesh = load_mesh(man.mesh, str(man.path))
    warnings = check_scene(man, mesh, masks, light)
    mesh, turned = orient_outward(mesh, man.views, str(man.path))   # exports often wind inside out
    return Scene(manifest=man, mesh=mesh, warnings=warnings + turned)


def _lossless(p: Path) -> bool:
    """A file that can hold a mask's exact two levels (a JPEG, HEIC or RAW photo cannot)."""
    return p.suffix.lower() in (".png", ".tif", ".tiff", ".bmp", ".gif")


def check_images(man: Manifest) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Every photo and mask decodes, is upright the camera's width x height, a mask is not empty and
    a photo is not its mask. Returns, by view name and reduced for the scene checks
    (featuretex.scene.sanity.coarse_mask): each view's mask, and for a view without one the light
    pixels of its photo when that holds only black and white (a mask named as the photo).

    The header is read first, so an image far larger than its camera is refused before decoding.
    Photos are decoded and dropped (pixels are read again when a stage asks for them).
    """
    file = str(man.path)
    masks: dict[str, np.ndarray] = {}
    light: dict[str, np.ndarray] = {}
    for v in man.views:
        want = (v.camera.width, v.camera.height)
        for fld, p in (("image", v.image), ("mask", v.mask)):
            if p is None:
                continue
            size = header_size(p)
            if size is not None and size != want:
                raise input_error(file, f"'{p.name}' is {size[0]}x{size[1]} (upright) but camera "
                                  f"'{v.camera.id}' is {want[0]}x{want[1]}", view=v.name, field=fld,
                                  hint="fix the camera's width/height or use the original photo")
        mask = load_mask(v.mask, file, v.name, want)
        if not _lossless(v.image):
            verify_image(v.image, file, v.name, "image")
        elif mask is not None:
            if photo_is_mask(decode_levels(v.image, file, v.name, "image"), mask):
                raise input_error(file, f"the photo '{v.image.name}' holds the same pixels as its mask "
                                  f"'{v.mask.name}'", view=v.name, field="image", hint=IMAGE_HINT)
        elif (white := two_level_light(decode_levels(v.image, file, v.name, "image"))) is not None:
            light[v.name] = coarse_mask(v, white)
        if mask is not None:
            masks[v.name] = coarse_mask(v, mask)
    return masks, light
