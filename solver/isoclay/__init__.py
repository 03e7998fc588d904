"""isoclay: reshape artists' meshes through a fitted neural signed-distance field."""

__version__ = "0.1.0"
