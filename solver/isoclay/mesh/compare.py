"""Distances between two surfaces: Chamfer-L1, Hausdorff and normal consistency, sampled and exact to triangles."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .measures import bbox_diagonal
from .types import TriangleMesh


@dataclass(frozen=True)
class SurfaceDistance:
    """Figures relative to the bounding-box diagonal of the reference mesh.

    chamfer_rel : mean of the two mean point-to-surface distances / diagonal
    hausdorff_rel : largest point-to-surface distance either way / diagonal
    normal_consistency : mean |cos| between a sample's normal and the closest triangle's (1 = perfect)
    """

    chamfer_rel: float
    hausdorff_rel: float
    normal_consistency: float


def _face_normals(v, f):
    n = np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])
    return n / np.maximum(np.linalg.norm(n, axis=1, keepdims=True), 1e-300)


def _one_way(src: TriangleMesh, dst: TriangleMesh, count: int, rng):
    import igl

    from ..field.supervision import sample_surface

    pts, normals = sample_surface(src, count, rng)
    sq, face, _ = igl.point_mesh_squared_distance(pts, np.ascontiguousarray(dst.vertices), np.ascontiguousarray(dst.faces))
    cos = np.abs(np.einsum("ij,ij->i", normals, _face_normals(dst.vertices, dst.faces)[face]))
    return np.sqrt(sq), cos


def surface_distance(result: TriangleMesh, reference: TriangleMesh, count: int = 100_000, seed: int = 0) -> SurfaceDistance:
    """Compare two meshes by sampling ``count`` points on each (libigl point_mesh_squared_distance)."""
    rng = np.random.default_rng(seed)
    d1, c1 = _one_way(result, reference, count, rng)
    d2, c2 = _one_way(reference, result, count, rng)
    diag = bbox_diagonal(reference.vertices)
    return SurfaceDistance(
        float((d1.mean() + d2.mean()) / 2 / diag),
        float(max(d1.max(), d2.max()) / diag),
        float((c1.mean() + c2.mean()) / 2),
    )
