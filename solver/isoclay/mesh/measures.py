"""Measures of a triangle mesh: size, area, volume, edges, loose parts, watertightness."""

from __future__ import annotations

import numba
import numpy as np


def bbox_diagonal(vertices: np.ndarray) -> float:
    """Length of the axis-aligned bounding box diagonal, in the vertices' units."""
    if len(vertices) == 0:
        return 0.0
    return float(np.linalg.norm(vertices.max(axis=0) - vertices.min(axis=0)))


def used_vertices(n_vertices: int, faces: np.ndarray) -> np.ndarray:
    """(n,) bool: vertices some face uses (a bincount; np.unique of 11M indices took ~1 s)."""
    return np.bincount(np.asarray(faces).reshape(-1), minlength=n_vertices) > 0


def face_areas(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(m,) area of each triangle."""
    return _face_areas(np.ascontiguousarray(vertices, dtype=np.float64), np.ascontiguousarray(faces, dtype=np.int64))


@numba.njit(cache=True)
def _face_areas(v, f):
    out = np.empty(f.shape[0])
    for t in range(f.shape[0]):
        a, b, c = f[t, 0], f[t, 1], f[t, 2]
        ux, uy, uz = v[b, 0] - v[a, 0], v[b, 1] - v[a, 1], v[b, 2] - v[a, 2]
        wx, wy, wz = v[c, 0] - v[a, 0], v[c, 1] - v[a, 1], v[c, 2] - v[a, 2]
        x, y, z = uy * wz - uz * wy, uz * wx - ux * wz, ux * wy - uy * wx
        out[t] = 0.5 * np.sqrt(x * x + y * y + z * z)
    return out


def edge_lengths(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(3m,) length of each face's edges 0-1, 1-2, 2-0 in face order (compiled: a 3.0M-face scan in
    0.1 s against 2 s by numpy's fancy indexing)."""
    return _edge_lengths(np.ascontiguousarray(vertices, dtype=np.float64), np.ascontiguousarray(faces, dtype=np.int64))


@numba.njit(cache=True)
def _edge_lengths(v, f):
    out = np.empty(f.shape[0] * 3)
    for t in range(f.shape[0]):
        for c in range(3):
            a, b = f[t, c], f[t, (c + 1) % 3]
            out[3 * t + c] = np.sqrt((v[a, 0] - v[b, 0]) ** 2 + (v[a, 1] - v[b, 1]) ** 2 + (v[a, 2] - v[b, 2]) ** 2)
    return out


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
    oriented manifold edge has count 2 and balance 0. One sort of int64 keys (a row-wise
    np.unique took 30 s on 3.9M faces, measured).
    """
    f = np.ascontiguousarray(faces, dtype=np.int64)
    if len(f) == 0:
        return np.zeros((0, 2), np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64)
    n = int(f.max()) + 1
    keys = np.sort(_edge_keys(f, n))
    uniq, counts, forward = _runs(keys)
    return np.stack([uniq // n, uniq % n], axis=1), counts, 2 * forward - counts


@numba.njit(cache=True)
def _edge_keys(f, n):
    """(3m,) int64: (lower * n + higher) * 2 + (edge runs from lower to higher)."""
    out = np.empty(3 * f.shape[0], np.int64)
    for t in range(f.shape[0]):
        for c in range(3):
            a, b = f[t, c], f[t, (c + 1) % 3]
            out[3 * t + c] = (min(a, b) * n + max(a, b)) * 2 + (1 if a < b else 0)
    return out


@numba.njit(cache=True)
def _runs(keys):
    """Edges of sorted keys with their face counts and forward uses."""
    m = 0
    for i in range(keys.shape[0]):
        if i == 0 or keys[i] >> 1 != keys[i - 1] >> 1:
            m += 1
    uniq = np.empty(m, np.int64)
    counts = np.zeros(m, np.int64)
    forward = np.zeros(m, np.int64)
    j = -1
    for i in range(keys.shape[0]):
        if i == 0 or keys[i] >> 1 != keys[i - 1] >> 1:
            j += 1
            uniq[j] = keys[i] >> 1
        counts[j] += 1
        forward[j] += keys[i] & 1
    return uniq, counts, forward


def is_watertight(faces: np.ndarray) -> bool:
    """True when every edge has exactly two faces, used once in each direction."""
    if len(faces) == 0:
        return False
    _, counts, balance = edge_face_counts(faces)
    return bool(np.all(counts == 2) and np.all(balance == 0))


def face_components(n_vertices: int, faces: np.ndarray) -> tuple[int, np.ndarray]:
    """Loose parts: (count, (m,) component label of each face), parts joined through shared vertices
    (union-find, compiled)."""
    f = np.ascontiguousarray(faces, dtype=np.int64)
    if len(f) == 0:
        return 0, np.zeros(0, np.int64)
    roots = _union_find(int(max(n_vertices, f.max() + 1)), f)
    uniq, labels = np.unique(roots[f[:, 0]], return_inverse=True)
    return len(uniq), labels.reshape(-1)


@numba.njit(cache=True)
def _find(parent, x):
    root = x
    while parent[root] != root:
        root = parent[root]
    while parent[x] != root:
        parent[x], x = root, parent[x]
    return root


@numba.njit(cache=True)
def _union_find(n, f):
    parent = np.arange(n)
    for t in range(f.shape[0]):
        a = _find(parent, f[t, 0])
        for c in (1, 2):
            b = _find(parent, f[t, c])
            if a != b:
                if a < b:
                    parent[b] = a
                else:
                    parent[a] = b
                    a = b
    for x in range(n):
        parent[x] = _find(parent, x)
    return parent


def part_volumes_and_sizes(vertices: np.ndarray, faces: np.ndarray, labels: np.ndarray, count: int):
    """Per loose part: signed volume (count,) and bounding-box diagonal (count,)."""
    return _part_measures(np.ascontiguousarray(vertices, dtype=np.float64), np.ascontiguousarray(faces, dtype=np.int64),
                          np.ascontiguousarray(labels, dtype=np.int64), int(count))


@numba.njit(cache=True)
def _part_measures(v, f, labels, count):
    vol = np.zeros(count)
    lo = np.full((count, 3), np.inf)
    hi = np.full((count, 3), -np.inf)
    for t in range(f.shape[0]):
        p = labels[t]
        a, b, c = f[t, 0], f[t, 1], f[t, 2]
        vol[p] += (v[a, 0] * (v[b, 1] * v[c, 2] - v[b, 2] * v[c, 1]) + v[a, 1] * (v[b, 2] * v[c, 0] - v[b, 0] * v[c, 2])
                   + v[a, 2] * (v[b, 0] * v[c, 1] - v[b, 1] * v[c, 0])) / 6.0
        for u in (a, b, c):
            for d in range(3):
                lo[p, d] = min(lo[p, d], v[u, d])
                hi[p, d] = max(hi[p, d], v[u, d])
    size = np.sqrt(((hi - lo) ** 2).sum(axis=1))
    return vol, size
