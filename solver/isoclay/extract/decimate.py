"""Reduce a mesh to a target face count by edge collapses: shortest edge first (libigl's
igl.decimate), or by quadric error (Garland & Heckbert 1997, pymeshlab's quadric edge collapse),
which keeps flat faces flat and sharp creases sharp at a few thousand faces."""

from __future__ import annotations

import numpy as np

from ..errors import InvalidInput
from ..mesh.types import TriangleMesh


def decimate(mesh: TriangleMesh, target_faces: int, quadric: bool = False) -> TriangleMesh:
    """A mesh with at most ``target_faces`` faces (returns the input when already smaller).

    quadric : collapse by quadric error instead of shortest edge first; measured on a sharpened
        cube decimated from 25k to 2000 faces: mean distance to the exact cube 6.9e-5 (quadric)
        against 1.7e-3 (shortest edge, which cuts the corners off). pymeshlab's collapse with its
        normal and triangle-quality checks: libigl's qslim folded 27 triangle pairs over (dark
        pits in a render) taking the sharpened demo anvil from 50k to 13k faces, pymeshlab none.
    """
    if target_faces < 4:
        raise InvalidInput(f"target face count {target_faces} too small: use at least 4")
    if mesh.n_faces <= target_faces:
        return mesh
    if quadric:
        import pymeshlab

        ms = pymeshlab.MeshSet()
        ms.add_mesh(pymeshlab.Mesh(np.ascontiguousarray(mesh.vertices, dtype=np.float64), np.ascontiguousarray(mesh.faces, dtype=np.int32)))
        ms.meshing_decimation_quadric_edge_collapse(targetfacenum=int(target_faces), preservenormal=True, planarquadric=True, qualitythr=0.3)
        out = ms.current_mesh()
        return TriangleMesh(np.asarray(out.vertex_matrix(), dtype=np.float64), np.asarray(out.face_matrix(), dtype=np.int64))
    import igl

    out = igl.decimate(np.ascontiguousarray(mesh.vertices), np.ascontiguousarray(mesh.faces), int(target_faces))
    v, f = out[0], out[1]  # libigl 2.6: (U, G, J, I)
    return TriangleMesh(np.asarray(v, dtype=np.float64), np.asarray(f, dtype=np.int64))
