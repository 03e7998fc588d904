"""Meshes from fields: narrow-band marching cubes, decimation."""

from .decimate import decimate
from .marching import bounds_of, extract_mesh

__all__ = ["bounds_of", "decimate", "extract_mesh"]
