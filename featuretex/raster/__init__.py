"""G-buffers: per-view screen-space buffers and the texture-space (UV) buffer."""
