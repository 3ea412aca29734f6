"""The exporter plugin protocol (entry-point group `featuretex.exporters`)."""

from __future__ import annotations

from pathlib import Path
from typing import Protocol, Sequence, runtime_checkable

import numpy as np

from featuretex import plugins
from featuretex.scene.mesh import SceneMesh


@runtime_checkable
class Exporter(Protocol):
    """Writes the textured mesh into the run directory in one file format.

    `texture_png` is the baked sRGB texture already written (normally `out_dir/texture.png`);
    `unlit` asks for a material that shows the texture without scene lighting. `mesh` is in the
    scene's frame and unit; `gltf_from_scene` is the (4, 4) matrix to metres and +Y up with the
    scene's up along +Y, for formats that define a unit and an up axis (glTF); formats that define
    neither (OBJ) stay in the scene's frame and unit. Returns every file written. Writes are atomic
    (featuretex.atomic). `outputs` declares, before anything is written, the files `export` makes
    in `out_dir`: the stage that runs the exporter is done only when all of them exist.
    """

    name: str

    def export(self, out_dir: Path, mesh: SceneMesh, texture_png: Path, *, unlit: bool,
               gltf_from_scene: np.ndarray) -> list[Path]:
        ...

    def outputs(self, out_dir: Path, texture_png: Path) -> list[Path]:
        ...


def load_exporters(formats: Sequence[str]) -> list[Exporter]:
    """An instance of each exporter plugin named in `formats` (config `export.formats`)."""
    return [plugins.load("exporters", name)() for name in formats]


def declared_outputs(exporters: Sequence[Exporter], out_dir: Path, texture_png: Path) -> list[Path]:
    """Every file the exporters declare they write into `out_dir`, in order, without repeats."""
    return list(dict.fromkeys(p for ex in exporters for p in ex.outputs(Path(out_dir), Path(texture_png))))
