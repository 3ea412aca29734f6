"""Geometry touch-up: move the scan surface along its normals where the diagnosis is confident the
photos see it elsewhere, then re-fit, re-bake and re-diagnose on the moved surface."""
