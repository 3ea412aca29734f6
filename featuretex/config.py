"""The run's settings: one dataclass per stage, each beside its stage, mounted here under its key
and registered in Hydra's ConfigStore.

Every field declares what it allows (featuretex/settings.py), and the command line checks every
setting before any stage runs. Plugins are chosen by registered *name* only (`raster.backend=embree`,
`fit.decoder=...`).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from hydra.core.config_store import ConfigStore

from featuretex.bake.config import BakeConfig, BaselineConfig, TextureConfig
from featuretex.diagnose.config import DiagnoseConfig
from featuretex.export.config import ExportConfig
from featuretex.fit.config import FitConfig
from featuretex.raster.config import RasterConfig
from featuretex.settings import setting
from featuretex.touchup.config import TouchupConfig
from featuretex.working_config import PhotoConfig


@dataclass
class FeaturetexConfig:
    scene: str = setting("???", check=bool, expect="a scene.yaml, its folder, or demo")  # path to scene.yaml (or its folder), or 'demo'
    out: Any = None               # run directory; in multirun, the sweep dir holds one per job
    seed: int = setting(0, ge=0, le=2**63 - 1)
    quiet: bool = False           # no progress bars (batch logs)
    raster: RasterConfig = field(default_factory=RasterConfig)
    photos: PhotoConfig = field(default_factory=PhotoConfig)
    texture: TextureConfig = field(default_factory=TextureConfig)
    baseline: BaselineConfig = field(default_factory=BaselineConfig)
    fit: FitConfig = field(default_factory=FitConfig)
    bake: BakeConfig = field(default_factory=BakeConfig)
    export: ExportConfig = field(default_factory=ExportConfig)
    diagnose: DiagnoseConfig = field(default_factory=DiagnoseConfig)
    report: bool = True           # write report.html (with error_map_views.png and preview.png)
    touchup: bool = False         # move the surface where the diagnosis is confident, re-fit, re-bake (touchup/)
    touchup_settings: TouchupConfig = field(default_factory=TouchupConfig)


@dataclass
class LauncherSettings:
    """What featuretex allows of the launcher settings it documents (`hydra.launcher.*`); the
    launcher plugins' own schemas check the types."""

    n_jobs: int = setting(-1, check=lambda v: v == -1 or v >= 1, expect="-1 (one job per core) or at least 1")
    timeout_min: int = setting(240, ge=1)
    cpus_per_task: int = setting(8, ge=1)
    mem_gb: float = setting(16, gt=0)
    tasks_per_node: int = setting(1, ge=1)
    nodes: int = setting(1, ge=1)
    array_parallelism: int = setting(64, ge=1)
    max_num_timeout: int = setting(0, ge=0)


def register() -> None:
    ConfigStore.instance().store(name="featuretex_schema", node=FeaturetexConfig)
