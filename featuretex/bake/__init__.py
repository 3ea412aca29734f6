"""Texture-space bakes: the classical baseline and the bake of the fitted model."""
