"""Settings of the G-buffer stage (`raster.*`)."""

from __future__ import annotations

from dataclasses import dataclass

from featuretex.settings import setting


@dataclass
class RasterConfig:
    backend: str = setting("embree", plugin="rasterisers")  # rasteriser plugin name (entry-point group featuretex.rasterisers)
