"""Settings of the export stage (`export.*`)."""

from __future__ import annotations

from dataclasses import dataclass

from featuretex.settings import setting


@dataclass
class ExportConfig:
    formats: list[str] = setting(["glb", "obj"], plugin="exporters")  # exporter plugin names
    unlit: bool = True            # glTF KHR_materials_unlit: viewers show the photographed look
