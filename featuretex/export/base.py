"""The exporter plugin protocol (entry-point group `featuretex.exporters`)."""

from __future__ import annotations

from pathlib import Path
from typing import Protocol, runtime_checkable

import numpy as np

from featuretex.scene.mesh import SceneMesh


@runtime_checkable
class Exporter(Protocol):
    """Writes the textured mesh into the run directory in one file format.

    `texture_png` is the baked sRGB texture already written (normally `out_dir/texture.png`);
    `unlit` asks for a material that shows the texture without scene lighting. `mesh` is in the
    scene's frame and unit; `gltf_from_scene` is the (4, 4) matrix to metres and +Y up with the
    scene's up along +Y, for formats that define a unit and an up axis (glTF); formats that define
    neither (OBJ) stay in the scene's frame and unit. Returns every file written. Writes are atomic
    (featuretex.atomic).
    """

    name: str

    def export(self, out_dir: Path, mesh: SceneMesh, texture_png: Path, *, unlit: bool,
               gltf_from_scene: np.ndarray) -> list[Path]:
        ...
