"""The learned model: feature texture, decoders (plugins), per-view corrections."""

from featuretex import plugins

# built-in decoders; the same names are declared as entry points (group featuretex.decoders)
plugins.register_builtin("decoders", "texel", "featuretex.model.decoders:TexelDecoder")
plugins.register_builtin("decoders", "texel-screen", "featuretex.model.decoders:TexelScreenDecoder")
