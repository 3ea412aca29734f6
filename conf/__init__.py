"""Hydra configuration files of featuretex (installed as the subpackage featuretex.conf)."""
