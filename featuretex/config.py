"""Structured configuration: one dataclass per stage, registered in Hydra's ConfigStore.

Overrides are type-checked and unknown keys are refused by Hydra (struct mode). Plugins are
chosen by registered *name* only (`raster.backend=embree`, `fit.decoder=...`).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from hydra.core.config_store import ConfigStore

from featuretex.bake.baseline import BaselineConfig
from featuretex.bake.neural import BakeConfig
from featuretex.diagnose.config import DiagnoseConfig
from featuretex.fit.config import FitConfig


@dataclass
class RasterConfig:
    backend: str = "embree"       # rasteriser plugin name (entry-point group featuretex.rasterisers)


@dataclass
class TextureConfig:
    size: int = 0                 # output texture size in texels; 0 = automatic from texel density
    min_size: int = 256
    max_size: int = 2048
    gutter: int = 8               # gutter padding in texels (common practice: >= 4 for mipmaps)
    bits: int = 8                 # PNG bit depth of texture.png: 8 or 16


@dataclass
class ExportConfig:
    formats: list[str] = field(default_factory=lambda: ["glb", "obj"])  # exporter plugin names
    unlit: bool = True            # glTF KHR_materials_unlit: viewers show the photographed look


@dataclass
class FeaturetexConfig:
    scene: str = "???"            # path to scene.yaml (or its folder), or 'demo'
    out: Any = None               # run directory; in multirun, the sweep dir holds one per job
    seed: int = 0
    quiet: bool = False           # no progress bars (batch logs)
    raster: RasterConfig = field(default_factory=RasterConfig)
    texture: TextureConfig = field(default_factory=TextureConfig)
    baseline: BaselineConfig = field(default_factory=BaselineConfig)
    fit: FitConfig = field(default_factory=FitConfig)
    bake: BakeConfig = field(default_factory=BakeConfig)
    export: ExportConfig = field(default_factory=ExportConfig)
    diagnose: DiagnoseConfig = field(default_factory=DiagnoseConfig)
    report: bool = True           # write report.html (with turntable previews)


def register() -> None:
    ConfigStore.instance().store(name="featuretex_schema", node=FeaturetexConfig)
