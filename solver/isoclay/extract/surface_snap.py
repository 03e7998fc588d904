"""Lay a rebuilt mesh back onto the scanned surface where the grid rounded it.

A field sampled on a grid rounds whatever is sharper than about one cell: the creases between a
sculpt's flat facets. Marching cubes then cuts across the rounding. Where the
input mesh is coarser than the extraction grid (its edges longer than half a cell), the input
itself knows the crisp surface, so each result vertex near it moves onto it:

1. **Projection**: a vertex within NEAR_CELLS cells of the input, whose normal agrees with the
   input face it lies over (a thin part's far side is never taken), moves to its closest point
   on the input, unless that point is on a hole's rim (the fill continues from there).
2. **No folds**: a triangle turned over or squashed by the moves sends its corners back halfway,
   up to FOLD_HALVINGS times, then to where they started.

The faces stay the extraction's, so marching cubes' triangles can still cut across a crease
between two vertices that lie on it (moving vertices onto the crease lines themselves, by the
quadric of Ju, Losasso, Schaefer & Warren 2002, folded the triangles around them: measured on
the demo anvil and the crossed bars, no gain after the fold guard). A scan finer than the grid is
left as the field gives it (the fine field already follows it, and asking millions of faces costs
seconds: 5.6 s for a 3.0M-face scan).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..mesh.types import TriangleMesh

#: Only inputs whose median edge is longer than this many extraction cells are snapped.
MIN_EDGE_CELLS = 0.5
#: A vertex farther than this many cells from the input stays where the field put it (a fill).
NEAR_CELLS = 1.0
#: ...and one whose normal is more than acos(AGREE) away from the input face's stays too.
AGREE = 0.5
#: Fold guard: a triangle whose normal turns by more than 90 degrees, or keeps less than this
#: share of its area, halves its corners' moves, FOLD_HALVINGS times at most, then cancels them.
MIN_AREA_KEPT = 0.05
FOLD_HALVINGS = 6


@dataclass(frozen=True)
class SnapReport:
    vertices_projected: int
    vertices_held_back: int  # moves shortened or cancelled by the fold guard
    largest_move: float  # unit-box length


def median_edge(vertices: np.ndarray, faces: np.ndarray) -> float:
    from ..mesh.measures import edge_lengths

    lengths = edge_lengths(vertices, faces)
    return float(np.median(lengths)) if len(lengths) else 0.0


def snap_to_scan(result: TriangleMesh, scan: TriangleMesh, cell: float) -> tuple[TriangleMesh, SnapReport]:
    """The result with its vertices laid onto the scan where they lie within NEAR_CELLS cells of it.

    cell : the extraction grid's cell (same units as both meshes). A scan whose median edge is
    below MIN_EDGE_CELLS cells comes back unchanged, as does an empty result.
    """
    none = SnapReport(0, 0, 0.0)
    if result.n_vertices == 0 or scan.n_faces == 0 or median_edge(scan.vertices, scan.faces) < MIN_EDGE_CELLS * cell:
        return result, none
    import igl

    from ..mesh.correspondence import usable_faces
    from .footprint import on_rim, rim_edges

    sv = np.ascontiguousarray(scan.vertices, dtype=np.float64)
    sf = np.ascontiguousarray(scan.faces[usable_faces(sv, scan.faces)], dtype=np.int64)
    if len(sf) == 0:
        return result, none
    v = np.asarray(result.vertices, dtype=np.float64)
    f = result.faces
    d2, face, closest = igl.point_mesh_squared_distance(np.ascontiguousarray(v), sv, sf)
    scan_normal = _face_normals(sv, sf)[face]
    near = (np.sqrt(d2) < NEAR_CELLS * cell) & ((scan_normal * _vertex_normals(v, f)).sum(axis=1) > AGREE)
    rim = rim_edges(sf, len(sv))
    if len(rim[0]):
        near &= ~on_rim(TriangleMesh(sv, sf), face, closest, rim)
    moved = np.flatnonzero(near)
    if not len(moved):
        return result, none
    target = v.copy()
    target[moved] = closest[moved]
    start_normal, start_area = _normals_areas(v, f)
    d = _without_folds(v, target - v, f, start_normal, start_area)
    held = int((np.abs(d - (target - v)).max(axis=1) > 0).sum())
    out_v = v + d
    out = TriangleMesh(out_v.astype(result.vertices.dtype, copy=False), f, dict(result.vertex_values))
    return out, SnapReport(int(len(moved)), held, float(np.linalg.norm(d, axis=1).max()))


def _normals_areas(v: np.ndarray, f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    n = np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])
    length = np.linalg.norm(n, axis=1)
    return n / np.maximum(length, 1e-300)[:, None], 0.5 * length


def _face_normals(v: np.ndarray, f: np.ndarray) -> np.ndarray:
    return _normals_areas(v, f)[0]


def _vertex_normals(v: np.ndarray, f: np.ndarray) -> np.ndarray:
    n = np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])
    out = np.zeros_like(v)
    for k in range(3):
        np.add.at(out, f[:, k], n)
    return out / np.maximum(np.linalg.norm(out, axis=1), 1e-300)[:, None]


def _without_folds(v: np.ndarray, d: np.ndarray, f: np.ndarray, normal: np.ndarray, area: np.ndarray) -> np.ndarray:
    """The moves d, shortened at the corners of triangles they would turn over or squash (triangles
    of no area to start with are not judged): halved FOLD_HALVINGS times at most, then cancelled."""
    d = d.copy()
    judged = area > 0
    halvings = 0
    while True:
        after, area_after = _normals_areas(v + d, f)
        bad = judged & (((after * normal).sum(axis=1) <= 0.0) | (area_after < MIN_AREA_KEPT * area))
        if not bad.any():
            return d
        d[np.unique(f[bad].reshape(-1))] *= 0.5 if halvings < FOLD_HALVINGS else 0.0
        halvings += 1
