"""Distortion of a deformed triangle mesh against its rest pose: the figures the benchmark compares.

The same measures are applied to any method's output (ours transported through the warp,
libigl ARAP's), so the comparison is fair:
- stretch per face: RMS of (eigenvalues of the triangle's 2x2 metric tensor F^T F) - 1, F the
  affine map from the rest triangle (in its own orthonormal frame) to the deformed one;
  the tangent-plane stretch of the map (common practice, no source);
- bend per edge: |change of dihedral angle| in radians (the discrete-shell bending measure,
  Grinspun et al. 2003, "Discrete Shells");
- flipped faces: a face whose deformed normal points against its rest normal rotated by the
  best local rotation of its neighbourhood (Kabsch 1976 on the one-ring edges).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


def _frames(v: np.ndarray, f: np.ndarray):
    e1 = v[f[:, 1]] - v[f[:, 0]]
    e2 = v[f[:, 2]] - v[f[:, 0]]
    n = np.cross(e1, e2)
    return e1, e2, n


def face_stretch(rest: np.ndarray, deformed: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(m,) RMS deviation of the face metric's eigenvalues from 1 (0 for a rigid motion)."""
    e1, e2, n = _frames(rest, faces)
    u = e1 / np.maximum(np.linalg.norm(e1, axis=1, keepdims=True), 1e-300)
    w = np.cross(n, u)
    w /= np.maximum(np.linalg.norm(w, axis=1, keepdims=True), 1e-300)
    dm = np.stack([np.stack([(e1 * u).sum(1), (e1 * w).sum(1)], 1), np.stack([(e2 * u).sum(1), (e2 * w).sum(1)], 1)], 2)
    d1, d2, _ = _frames(deformed, faces)
    ds = np.stack([d1, d2], axis=2)  # (m, 3, 2)
    ok = np.abs(np.linalg.det(dm)) > 1e-300
    F = np.zeros_like(ds)
    F[ok] = ds[ok] @ np.linalg.inv(dm[ok])
    G = np.transpose(F, (0, 2, 1)) @ F
    dev = G - np.eye(2)
    out = np.sqrt((dev**2).sum(axis=(1, 2)) / 2.0)
    out[~ok] = 0.0
    return out


def _interior_edges(faces: np.ndarray):
    """Edges shared by exactly two faces: (k, 2) vertex ids, (k, 2) face ids."""
    m = len(faces)
    directed = np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]])
    owner = np.tile(np.arange(m), 3)
    key = np.sort(directed, axis=1)
    order = np.lexsort((key[:, 1], key[:, 0]))
    key, owner = key[order], owner[order]
    same = np.all(key[1:] == key[:-1], axis=1)
    first = np.flatnonzero(same)
    # keep only pairs (an edge seen exactly twice)
    single = np.ones(len(first), dtype=bool)
    if len(first) > 1:
        triple = np.isin(first, first + 1) | np.isin(first, first - 1)
        single &= ~triple
    first = first[single]
    return key[first], np.stack([owner[first], owner[first + 1]], axis=1)


def dihedral_angles(vertices: np.ndarray, faces: np.ndarray, edge_faces: np.ndarray) -> np.ndarray:
    """(k,) angle between the normals of the two faces of each edge, radians in [0, pi]."""
    _, _, n = _frames(vertices, faces)
    n = n / np.maximum(np.linalg.norm(n, axis=1, keepdims=True), 1e-300)
    c = (n[edge_faces[:, 0]] * n[edge_faces[:, 1]]).sum(1)
    return np.arccos(np.clip(c, -1.0, 1.0))


def edge_bend(rest: np.ndarray, deformed: np.ndarray, faces: np.ndarray):
    """(edges (k, 2), |change of dihedral angle| (k,) radians) over interior edges."""
    edges, ef = _interior_edges(faces)
    return edges, np.abs(dihedral_angles(deformed, faces, ef) - dihedral_angles(rest, faces, ef))


def vertex_average(n_vertices: int, edges: np.ndarray, values: np.ndarray) -> np.ndarray:
    """(n,) mean of edge values over the edges at each vertex (0 where none)."""
    total = np.bincount(edges.ravel(), weights=np.repeat(values, 2), minlength=n_vertices)
    count = np.bincount(edges.ravel(), minlength=n_vertices)
    return total / np.maximum(count, 1)


def flipped_faces(rest: np.ndarray, deformed: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(m,) bool: the deformed normal opposes the rest normal under the face neighbourhood's best rotation."""
    n_v = len(rest)
    # per-vertex covariance of incident edge vectors, rest x deformed (Kabsch 1976)
    cov = np.zeros((n_v, 9))
    for a, b in ((0, 1), (1, 2), (2, 0)):
        er = rest[faces[:, b]] - rest[faces[:, a]]
        ed = deformed[faces[:, b]] - deformed[faces[:, a]]
        outer = (er[:, :, None] * ed[:, None, :]).reshape(-1, 9)
        for ends in (faces[:, a], faces[:, b]):
            for k in range(9):  # bincount is many times faster than np.add.at
                cov[:, k] += np.bincount(ends, weights=outer[:, k], minlength=n_v)
    cov = cov.reshape(n_v, 3, 3)
    s = cov[faces[:, 0]] + cov[faces[:, 1]] + cov[faces[:, 2]]
    u, _, vt = np.linalg.svd(s)
    d = np.sign(np.linalg.det(np.transpose(vt, (0, 2, 1)) @ np.transpose(u, (0, 2, 1))))
    d[d == 0] = 1.0
    fix = np.ones((len(faces), 3))
    fix[:, 2] = d
    rot = np.transpose(vt, (0, 2, 1)) @ (fix[:, :, None] * np.transpose(u, (0, 2, 1)))
    _, _, n0 = _frames(rest, faces)
    _, _, n1 = _frames(deformed, faces)
    rotated = (rot @ n0[:, :, None])[:, :, 0]
    return (rotated * n1).sum(1) < 0


@dataclass(frozen=True)
class Distortion:
    """Summary over a mesh: stretch_mean / stretch_max (area-weighted, dimensionless),
    bend_mean_rad / bend_max_rad (length-weighted, per interior edge), flipped (faces)."""

    stretch_mean: float
    stretch_max: float
    bend_mean_rad: float
    bend_max_rad: float
    flipped: int


def distortion(rest: np.ndarray, deformed: np.ndarray, faces: np.ndarray) -> Distortion:
    """Distortion of deformed (n, 3) against rest (n, 3), same faces (m, 3)."""
    _, _, n = _frames(rest, faces)
    area = 0.5 * np.linalg.norm(n, axis=1)
    s = face_stretch(rest, deformed, faces)
    edges, b = edge_bend(rest, deformed, faces)
    length = np.linalg.norm(rest[edges[:, 1]] - rest[edges[:, 0]], axis=1)
    return Distortion(
        float((s * area).sum() / max(area.sum(), 1e-300)),
        float(s.max(initial=0.0)),
        float((b * length).sum() / max(length.sum(), 1e-300)) if len(b) else 0.0,
        float(b.max(initial=0.0)),
        int(flipped_faces(rest, deformed, faces).sum()),
    )
