"""Map a mesh into the solver's unit box and results back into the mesh's own units."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .types import TriangleMesh


@dataclass(frozen=True)
class Normalization:
    """unit = (world - center) * scale: bbox centred at the origin, longest side 1.

    center : (3,) float64, world units
    scale : float64, unit-box lengths per world unit
    """

    center: tuple[float, float, float]
    scale: float

    @classmethod
    def of(cls, vertices: np.ndarray) -> "Normalization":
        lo, hi = vertices.min(axis=0), vertices.max(axis=0)
        return cls(tuple(float(c) for c in (lo + hi) / 2), float(1.0 / np.max(hi - lo)))

    def to_unit(self, points: np.ndarray) -> np.ndarray:
        """points : (n, 3) world units -> (n, 3) float64 unit-box coordinates (new array)."""
        return (np.asarray(points, dtype=np.float64) - np.asarray(self.center)) * self.scale

    def from_unit(self, points: np.ndarray) -> np.ndarray:
        """points : (n, 3) unit-box coordinates -> (n, 3) float64 world units (new array)."""
        return np.asarray(points, dtype=np.float64) / self.scale + np.asarray(self.center)

    def length_to_unit(self, length: float) -> float:
        return float(length) * self.scale

    def length_from_unit(self, length: float) -> float:
        return float(length) / self.scale

    def mesh_to_unit(self, mesh: TriangleMesh) -> TriangleMesh:
        return TriangleMesh(self.to_unit(mesh.vertices), mesh.faces, dict(mesh.vertex_values), mesh.source)

    def mesh_from_unit(self, mesh: TriangleMesh) -> TriangleMesh:
        return TriangleMesh(self.from_unit(mesh.vertices), mesh.faces, dict(mesh.vertex_values), mesh.source)
