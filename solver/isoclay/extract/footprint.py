"""Open stays open: trim a closed result surface to the part that lies over the scanned surface.

A field fitted to an open scan closes its holes (winding-number sign), so its level set carries a
cap where the scan had none. A result face belongs to the scan's footprint when its closest
point on the input lies straight below or above it (the offset runs along the input's normal
there) or when it lies on the input; beyond a hole's rim the closest input point is on the rim
and the offset runs sideways, along the missing surface: such faces are dropped.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..mesh.types import TriangleMesh

#: Offsets whose direction makes an angle with the input's normal below acos(ALONG_NORMAL) run
#: across the surface: the face lies over the scan (a cap beyond a rim sits sideways, ~90 degrees).
ALONG_NORMAL = 0.6
#: Pieces left with fewer faces than this share of the largest piece are specks of the cap.
MIN_PIECE_SHARE = 0.01


@dataclass(frozen=True)
class TrimReport:
    faces_removed: int
    open_edges_input: int


def boundary_edge_count(faces: np.ndarray) -> int:
    """Edges used by exactly one face (the rims of holes)."""
    e = np.sort(np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]]), axis=1)
    _, counts = np.unique(e, axis=0, return_counts=True)
    return int((counts == 1).sum())


def trim_to_footprint(result: TriangleMesh, scan: TriangleMesh, on_surface: float) -> tuple[TriangleMesh, TrimReport]:
    """Drop the result faces that lie beyond the scan's open rims.

    on_surface : unit-box length under which a face counts as lying on the scan whatever the
        direction (about a quarter of the field's cell)
    A closed scan is returned unchanged. Unused vertices are removed; vertex_values follow.
    """
    import igl

    open_edges = boundary_edge_count(scan.faces)
    if open_edges == 0 or result.n_faces == 0:
        return result, TrimReport(0, open_edges)
    v, f = result.vertices, result.faces
    centre = v[f].mean(axis=1)
    d2, face, closest = igl.point_mesh_squared_distance(centre, scan.vertices, scan.faces)
    sv, sf = scan.vertices, scan.faces
    n = np.cross(sv[sf[:, 1]] - sv[sf[:, 0]], sv[sf[:, 2]] - sv[sf[:, 0]])
    n /= np.maximum(np.linalg.norm(n, axis=1, keepdims=True), 1e-300)
    offset = centre - closest
    dist = np.sqrt(d2)
    along = np.abs((offset * n[face]).sum(1)) / np.maximum(dist, 1e-300)
    keep = (dist < on_surface) | (along > ALONG_NORMAL)
    keep = _drop_specks(f, keep, len(v))
    kept = f[keep]
    used = np.unique(kept)
    remap = np.full(len(v), -1, dtype=np.int64)
    remap[used] = np.arange(len(used))
    values = {k: a[used] for k, a in result.vertex_values.items()}
    out = TriangleMesh(v[used], remap[kept], values)
    return out, TrimReport(int((~keep).sum()), open_edges)


def _drop_specks(faces: np.ndarray, keep: np.ndarray, n_vertices: int) -> np.ndarray:
    """keep with the small connected pieces of the kept faces removed."""
    from ..mesh.measures import face_components

    idx = np.flatnonzero(keep)
    if len(idx) == 0:
        return keep
    count, labels = face_components(n_vertices, faces[idx])
    if count <= 1:
        return keep
    sizes = np.bincount(labels, minlength=count)
    good = sizes >= MIN_PIECE_SHARE * sizes.max()
    out = np.zeros_like(keep)
    out[idx[good[labels]]] = True
    return out
