"""Open stays open: trim a closed result surface to the part that lies over the scanned surface.

A field fitted to an open scan closes its holes (winding-number sign), so its level set carries a
cap where the scan had none. A result face lies over the scan's footprint when its closest point
on the input is inside the scanned surface, or when it lies on the input; beyond a hole's rim
the closest input point is on the rim itself (a boundary edge or vertex): such faces are dropped.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..mesh.types import TriangleMesh

#: A closest point whose barycentric coordinate for a corner is below this lies on the opposite edge.
ON_EDGE = 1e-6
#: Pieces left with fewer faces than this share of the largest piece are specks of the cap.
MIN_PIECE_SHARE = 0.01


@dataclass(frozen=True)
class TrimReport:
    faces_removed: int
    open_edges_input: int


def boundary_edge_count(faces: np.ndarray) -> int:
    """Edges used by exactly one face (the rims of holes)."""
    from ..mesh.measures import edge_face_counts

    return int((edge_face_counts(faces)[1] == 1).sum())


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
    keep = (np.sqrt(d2) < on_surface) | ~on_rim(scan, face, closest)
    keep = _drop_specks(f, keep, len(v))
    kept = f[keep]
    used = np.unique(kept)
    remap = np.full(len(v), -1, dtype=np.int64)
    remap[used] = np.arange(len(used))
    values = {k: a[used] for k, a in result.vertex_values.items()}
    out = TriangleMesh(v[used], remap[kept], values)
    return out, TrimReport(int((~keep).sum()), open_edges)


def rim_edges(faces: np.ndarray, n_vertices: int) -> tuple[np.ndarray, np.ndarray]:
    """(keys, rim_vertex): the boundary edges of a face set as keys min * n + max, sorted, and a
    (n,) mask of the vertices on them."""
    from ..mesh.measures import edge_face_counts

    edges, counts, _ = edge_face_counts(faces)
    rim = edges[counts == 1]
    rim_vertex = np.zeros(n_vertices, dtype=bool)
    rim_vertex[rim.reshape(-1)] = True
    return rim[:, 0] * n_vertices + rim[:, 1], rim_vertex


def on_rim(scan: TriangleMesh, face: np.ndarray, point: np.ndarray, rim=None) -> np.ndarray:
    """(k,) True where a closest point (on scan face `face`) lies on a boundary edge or vertex;
    rim : rim_edges(scan.faces, ...) when already known."""
    sv, sf = scan.vertices, scan.faces
    n = len(sv)
    rim_keys, rim_vertex = rim if rim is not None else rim_edges(sf, n)
    tri = sf[face]
    a, b, c = sv[tri[:, 0]], sv[tri[:, 1]], sv[tri[:, 2]]
    # barycentric coordinates of the closest point (common practice, no source)
    v0, v1, v2 = b - a, c - a, point - a
    d00, d01, d11 = (v0 * v0).sum(1), (v0 * v1).sum(1), (v1 * v1).sum(1)
    d20, d21 = (v2 * v0).sum(1), (v2 * v1).sum(1)
    den = np.maximum(d00 * d11 - d01 * d01, 1e-300)
    w1 = (d11 * d20 - d01 * d21) / den
    w2 = (d00 * d21 - d01 * d20) / den
    bary = np.stack([1.0 - w1 - w2, w1, w2], axis=1)
    out = np.zeros(len(face), dtype=bool)
    for k in range(3):
        i, j = tri[:, (k + 1) % 3], tri[:, (k + 2) % 3]
        on_edge = bary[:, k] < ON_EDGE
        key = np.minimum(i, j) * n + np.maximum(i, j)
        out |= on_edge & np.isin(key, rim_keys)
        out |= (bary[:, k] > 1.0 - ON_EDGE) & rim_vertex[tri[:, k]]
    return out


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
