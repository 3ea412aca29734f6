"""The learned model: feature texture, decoders (plugins of kind "decoders", the built-ins declared
as entry points in pyproject.toml), per-view corrections."""
