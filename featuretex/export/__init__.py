"""Exporters (plugins of kind "exporters", the built-ins declared as entry points in pyproject.toml):
textured mesh as glTF binary and OBJ+MTL, vertex-coloured PLY."""

from featuretex.lazy import lazy_exports

__all__ = ["Exporter"]
__getattr__ = lazy_exports(__name__, {"Exporter": "featuretex.export.base"})
