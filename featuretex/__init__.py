"""featuretex: learned feature textures for imperfect 3D scans, fitted, baked and diagnosed on a CPU."""

__version__ = "0.1.0"
