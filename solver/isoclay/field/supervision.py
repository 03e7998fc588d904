"""Exact signed distances to a mesh, signed by generalized winding numbers so open scans still work.

Sign: Jacobson et al. 2013 ("Robust inside-outside segmentation using generalized winding
numbers") with the fast approximation of Barill et al. 2018, as implemented in libigl.
"""

from __future__ import annotations

import numpy as np

from ..mesh.measures import face_areas
from ..mesh.types import TriangleMesh


class SignedDistance:
    """Signed distance queries against one mesh (unit-box coordinates).

    __call__(points (n, 3)) -> (n,) float64, negative inside. Winding number > 0.5 means inside.
    """

    def __init__(self, mesh: TriangleMesh):
        self.vertices = np.ascontiguousarray(mesh.vertices, dtype=np.float64)
        self.faces = np.ascontiguousarray(mesh.faces, dtype=np.int64)

    def __call__(self, points: np.ndarray) -> np.ndarray:
        import igl

        p = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        if len(p) == 0:
            return np.zeros(0)
        squared = igl.point_mesh_squared_distance(p, self.vertices, self.faces)[0]
        winding = igl.fast_winding_number(self.vertices, self.faces, p)
        return np.where(winding > 0.5, -1.0, 1.0) * np.sqrt(squared)

    def unsigned(self, points: np.ndarray) -> np.ndarray:
        import igl

        p = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        return np.sqrt(igl.point_mesh_squared_distance(p, self.vertices, self.faces)[0])


def sample_surface(mesh: TriangleMesh, count: int, rng: np.random.Generator, with_faces: bool = False):
    """Area-uniform random points on the mesh and their face normals: ((count, 3), (count, 3)), and
    with_faces the face of each point (count,)."""
    v, f = mesh.vertices, mesh.faces
    area = 2.0 * face_areas(v, f)  # |(b - a) x (c - a)|, the same numbers as numpy's cross and norm
    face = rng.choice(len(f), size=count, p=area / area.sum())
    r1 = np.sqrt(rng.random(count))
    r2 = rng.random(count)
    a, b, c = v[f[face, 0]], v[f[face, 1]], v[f[face, 2]]  # only the chosen faces (a scan has millions)
    points = (1 - r1)[:, None] * a + (r1 * (1 - r2))[:, None] * b + (r1 * r2)[:, None] * c
    normals = np.cross(b - a, c - a) / np.maximum(area[face], 1e-300)[:, None]
    return (points, normals, face) if with_faces else (points, normals)

