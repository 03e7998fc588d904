"""Mesh intake: reading, validation, normalization and measures."""

from .io import FORMATS, read_mesh, write_mesh
from .normalize import Normalization
from .types import TriangleMesh, make_mesh
from .validate import MeshCheck, validate_mesh

__all__ = ["FORMATS", "MeshCheck", "Normalization", "TriangleMesh", "make_mesh", "read_mesh", "validate_mesh", "write_mesh"]
