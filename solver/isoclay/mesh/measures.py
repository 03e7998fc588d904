"""Measures of a triangle mesh: size, area, volume, edges, loose parts, watertightness."""

from __future__ import annotations

import numpy as np
import scipy.sparse
import scipy.sparse.csgraph


def bbox_diagonal(vertices: np.ndarray) -> float:
    """Length of the axis-aligned bounding box diagonal, in the vertices' units."""
    if len(vertices) == 0:
        return 0.0
    return float(np.linalg.norm(vertices.max(axis=0) - vertices.min(axis=0)))


def face_areas(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(m,) area of each triangle."""
    a, b, c = (vertices[faces[:, i]] for i in range(3))
    return 0.5 * np.linalg.norm(np.cross(b - a, c - a), axis=1)


def surface_area(vertices: np.ndarray, faces: np.ndarray) -> float:
    return float(face_areas(vertices, faces).sum())


def signed_volume(vertices: np.ndarray, faces: np.ndarray) -> float:
    """Enclosed volume by the divergence theorem; positive for outward-facing triangles."""
    a, b, c = (vertices[faces[:, i]] for i in range(3))
    return float(np.einsum("ij,ij->i", a, np.cross(b, c)).sum() / 6.0)


def has_degenerate_faces(vertices: np.ndarray, faces: np.ndarray) -> bool:
    """True when some triangle repeats a vertex or has two corners at the same position."""
    if ((faces[:, 0] == faces[:, 1]) | (faces[:, 1] == faces[:, 2]) | (faces[:, 2] == faces[:, 0])).any():
        return True
    a, b, c = (vertices[faces[:, i]] for i in range(3))
    return bool(((a == b).all(1) | (b == c).all(1) | (c == a).all(1)).any())


def edge_face_counts(faces: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Undirected edges (k, 2) sorted, how many faces use each (k,), and directed-use balance (k,).

    The balance is (#times used as a->b with a<b) - (#times used b->a); a consistently
    oriented manifold edge has count 2 and balance 0.
    """
    directed = np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]])
    forward = directed[:, 0] < directed[:, 1]
    und = np.sort(directed, axis=1)
    # one int64 code per edge (a * n + b sorts as (a, b) does): np.unique on a flat array is about
    # 10x faster than on rows (327k faces: 1.3 s -> 0.1 s, measured)
    n = int(und.max()) + 1 if len(und) else 1
    codes, inverse, counts = np.unique(und[:, 0] * n + und[:, 1], return_inverse=True, return_counts=True)
    edges = np.column_stack([codes // n, codes % n])
    balance = np.bincount(inverse.ravel(), weights=np.where(forward, 1, -1), minlength=len(edges))
    return edges, counts, balance.astype(np.int64)


def is_watertight(faces: np.ndarray) -> bool:
    """True when every edge has exactly two faces, used once in each direction."""
    if len(faces) == 0:
        return False
    _, counts, balance = edge_face_counts(faces)
    return bool(np.all(counts == 2) and np.all(balance == 0))


def face_components(n_vertices: int, faces: np.ndarray) -> tuple[int, np.ndarray]:
    """Loose parts: (count, (m,) component label of each face), parts joined through shared vertices."""
    m = len(faces)
    rows = np.repeat(np.arange(m), 3)
    graph = scipy.sparse.coo_matrix((np.ones(3 * m), (rows, faces.ravel())), shape=(m, n_vertices)).tocsr()
    # faces are connected when they share a vertex: components of the bipartite graph
    full = scipy.sparse.bmat([[None, graph], [graph.T, None]]).tocsr()
    count, labels = scipy.sparse.csgraph.connected_components(full, directed=False)
    face_labels = labels[:m]
    uniq, face_labels = np.unique(face_labels, return_inverse=True)
    return len(uniq), face_labels
