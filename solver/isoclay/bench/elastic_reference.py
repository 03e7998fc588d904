"""The elastic reference: volumetric as-rigid-as-possible deformation on a tetrahedral mesh (libigl).

Chao, Pinkall, Sanan & Schroeder 2010, "A simple geometric model for elastic deformations", as
libigl implements it: the prop's surface is meshed into tetrahedra by TetGen
(igl.copyleft.tetgen.tetrahedralize, flag Y keeps the surface vertices first and unmoved), the
handle vertices are fixed at their targets, the start is the biharmonic interpolation of the
handle displacements (igl.harmonic, k = 2), and igl.arap_solve iterates to convergence (a move
threshold, not a fixed count: the last iterations move little but matter). It needs a closed,
manifold surface, which is exactly what our own method does not.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class ReferenceResult:
    """vertices : (n, 3) the surface vertices deformed; tet_vertices, tets : mesh sizes;
    iterations : ARAP iterations run; converged : the move threshold was met; seconds : per stage."""

    vertices: np.ndarray
    tet_vertices: int
    tets: int
    iterations: int
    converged: bool
    seconds: dict


def tetrahedralize(vertices: np.ndarray, faces: np.ndarray, flags: str = "pq1.5YQ"):
    """(TV, TT) tetrahedra of a closed surface whose first len(vertices) nodes are the surface's."""
    import igl.copyleft.tetgen as tetgen

    v = np.ascontiguousarray(vertices, dtype=np.float64)
    tv, tt = tetgen.tetrahedralize(v, np.ascontiguousarray(faces, dtype=np.int64), flags=flags)[:2]
    if len(tt) == 0 or not np.allclose(tv[: len(v)], v):
        raise RuntimeError("tetgen could not mesh this surface with its vertices kept (is it closed and manifold?)")
    return tv, tt


def _start(vertices, faces, handle_ids, handle_targets, flags):
    """TetGen mesh, held nodes and targets, biharmonic start and ARAP data: (tv, b, bc, u, data)."""
    import igl

    tv, tt = tetrahedralize(vertices, faces, flags)
    b = np.ascontiguousarray(handle_ids, dtype=np.int64)
    bc = np.ascontiguousarray(handle_targets, dtype=np.float64)
    u = tv + igl.harmonic(tv, tt, b, bc - tv[b], 2)
    data = igl.ARAPData()
    data.max_iter = 1
    igl.arap_precomputation(tv, tt, 3, b, data)
    return tv, tt, bc, u, data


def tet_arap(vertices: np.ndarray, faces: np.ndarray, handle_ids: np.ndarray, handle_targets: np.ndarray,
             max_iterations: int = 4000, move_rel: float = 1e-7, flags: str = "pq1.5YQ") -> ReferenceResult:
    """Deform a closed surface mesh by volumetric ARAP with the given vertices held at targets.

    handle_ids : (k,) surface vertex indices; handle_targets : (k, 3). Stops when no vertex moved
    more than move_rel x the bounding-box diagonal in one iteration, or after max_iterations.
    """
    import igl

    t0 = time.perf_counter()
    tv, tt, bc, u, data = _start(vertices, faces, handle_ids, handle_targets, flags)
    t1 = time.perf_counter()
    diagonal = float(np.linalg.norm(vertices.max(axis=0) - vertices.min(axis=0)))
    converged, it = False, 0
    for it in range(1, max_iterations + 1):
        new = igl.arap_solve(bc, data, u)
        move = float(np.abs(new - u).max())
        u = new
        if move < move_rel * diagonal:
            converged = True
            break
    t2 = time.perf_counter()
    return ReferenceResult(u[: len(vertices)].copy(), len(tv), len(tt), it, converged,
                           {"tetrahedralize_and_start": t1 - t0, "arap": t2 - t1, "total": t2 - t0})


def arap_iterations_seconds(vertices: np.ndarray, faces: np.ndarray, handle_ids: np.ndarray, handle_targets: np.ndarray,
                            iterations: int = 200, flags: str = "pq1.5YQ") -> float:
    """Wall time of tetgen plus a fixed number of ARAP iterations (the speed reference of the benchmark)."""
    import igl

    t0 = time.perf_counter()
    _, _, bc, u, data = _start(vertices, faces, handle_ids, handle_targets, flags)
    for _ in range(iterations):
        u = igl.arap_solve(bc, data, u)
    return time.perf_counter() - t0
