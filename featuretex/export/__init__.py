"""Exporters: textured mesh as glTF binary and OBJ+MTL, texture PNG, vertex-coloured PLY."""

from featuretex.export.base import Exporter
from featuretex.plugins import register_builtin

register_builtin("exporters", "glb", "featuretex.export.gltf:GlbExporter")
register_builtin("exporters", "obj", "featuretex.export.obj:ObjExporter")

__all__ = ["Exporter"]
