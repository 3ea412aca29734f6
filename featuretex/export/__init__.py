"""Exporters: textured mesh as glTF binary and OBJ+MTL, texture PNG, vertex-coloured PLY."""

from featuretex.lazy import lazy_exports
from featuretex.plugins import register_builtin

register_builtin("exporters", "glb", "featuretex.export.gltf:GlbExporter")
register_builtin("exporters", "obj", "featuretex.export.obj:ObjExporter")

__all__ = ["Exporter"]
__getattr__ = lazy_exports(__name__, {"Exporter": "featuretex.export.base"})
