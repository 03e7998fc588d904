"""The triangle mesh record passed between isoclay's stages."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np


@dataclass(frozen=True)
class TriangleMesh:
    """A triangle mesh.

    vertices : (n, 3) float64, in the units of whoever holds it (world or unit box)
    faces : (m, 3) int64, indices into vertices, counter-clockwise seen from outside
    vertex_values : name -> (n,) float32 per-vertex scalars (distortion, displacement...)
    source : the object the mesh was read from (a trimesh.Trimesh), kept so a write with
        the original topology can carry UVs and materials through; never modified.
    """

    vertices: np.ndarray
    faces: np.ndarray
    vertex_values: dict[str, np.ndarray] = field(default_factory=dict)
    source: Any = None

    @property
    def n_vertices(self) -> int:
        return int(self.vertices.shape[0])

    @property
    def n_faces(self) -> int:
        return int(self.faces.shape[0])

    def with_vertices(self, vertices: np.ndarray, **values: np.ndarray) -> "TriangleMesh":
        """Same faces and source, new positions (n, 3) and extra per-vertex values."""
        merged = dict(self.vertex_values)
        merged.update({k: np.asarray(v, dtype=np.float32) for k, v in values.items()})
        return TriangleMesh(np.asarray(vertices, dtype=np.float64), self.faces, merged, self.source)


def make_mesh(vertices, faces) -> TriangleMesh:
    """Build a TriangleMesh from array-likes, copying into the canonical dtypes."""
    v = np.array(vertices, dtype=np.float64, copy=True).reshape(-1, 3)
    f = np.array(faces, dtype=np.int64, copy=True).reshape(-1, 3)
    return TriangleMesh(v, f)
