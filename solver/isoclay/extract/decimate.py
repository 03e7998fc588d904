"""Reduce a mesh to a target face count with quadric-error edge collapses (libigl decimate)."""

from __future__ import annotations

import numpy as np

from ..errors import InvalidInput
from ..mesh.types import TriangleMesh


def decimate(mesh: TriangleMesh, target_faces: int) -> TriangleMesh:
    """A mesh with at most ``target_faces`` faces (returns the input when already smaller)."""
    import igl

    if target_faces < 4:
        raise InvalidInput(f"target face count {target_faces} too small: use at least 4")
    if mesh.n_faces <= target_faces:
        return mesh
    out = igl.decimate(np.ascontiguousarray(mesh.vertices), np.ascontiguousarray(mesh.faces), int(target_faces))
    v, f = out[0], out[1]  # libigl 2.6: (U, G, J, I)
    return TriangleMesh(np.asarray(v, dtype=np.float64), np.asarray(f, dtype=np.int64))
