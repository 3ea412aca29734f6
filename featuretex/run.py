"""What every stage of a run works from: the scene, its G-buffers and texels once they are made,
the configuration, the run folder and the stage book that records what each stage did."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from featuretex.config import FeaturetexConfig
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.loaded import Scene
from featuretex.stages import StageBook


@dataclass
class RunContext:
    """One run of one scene. `scene` is replaced by its working scene after the working-photo
    stage; `gbuffers` and `texels` are filled by the stages that make them."""

    scene: Scene
    cfg: FeaturetexConfig
    out: Path
    book: StageBook
    gbuffers: dict[str, GBuffer] = field(default_factory=dict)
    texels: TexelBuffer | None = None

    def stage_file(self, name: str) -> Path:
        """`out/stages/<name>`: a stage's own record or intermediate result."""
        return self.out / "stages" / name
