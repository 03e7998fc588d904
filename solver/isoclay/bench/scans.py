"""Generated scans for the remesh benchmark (our own workshop scenario, no outside data).

A river stone picked up from the workshop's yard and "scanned": a flattened pebble with lumps,
a scanner's fine noise along the normals, and holes where the scanner could not see (each a
patch of faces removed). The closed, noisy surface before the holes were cut is kept as the
intact reference for hole fills. A second case is the same kind of scan subdivided to millions
of faces (midpoint subdivision keeps the surface exactly, so the coarse scan is its reference).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from ..extract import extract_mesh
from ..field.base import SDFField
from ..mesh.types import TriangleMesh


class PebbleSDF(SDFField):
    """A flattened ellipsoid (semi-axes 0.45, 0.33, 0.2) with low lumps; not an exact distance."""

    kind = "pebble"

    def __init__(self, seed: int = 0):
        super().__init__()
        rng = np.random.default_rng(seed)
        self.register_buffer("waves", torch.tensor(rng.normal(size=(12, 3)) * 9.0, dtype=torch.float32))
        self.register_buffer("phases", torch.tensor(rng.uniform(0, 2 * np.pi, 12), dtype=torch.float32))

    def config(self) -> dict:
        return {}

    def forward(self, p):
        axes = torch.tensor([0.45, 0.33, 0.2])
        base = (torch.linalg.norm(p / axes, dim=1) - 1.0) * 0.2
        lumps = torch.sin(p @ self.waves.T + self.phases).mean(dim=1) * 0.012
        return base + lumps


@dataclass(frozen=True)
class Scan:
    """mesh : the scan with holes (unit-ish coordinates); intact : the closed scan before the holes;
    hole_faces : (k,) indices into intact.faces of the removed faces."""

    mesh: TriangleMesh
    intact: TriangleMesh
    hole_faces: np.ndarray


def scanned_stone(resolution: int = 150, holes: int = 5, hole_radius: float = 0.05, noise: float = 0.0008,
                  seed: int = 0) -> Scan:
    """The stone scan. resolution 150 gives about 35k vertices; noise is the rms of the scanner's
    displacement along the normals (unit-box lengths); holes patches of radius hole_radius."""
    rng = np.random.default_rng(seed)
    surface = extract_mesh(PebbleSDF(seed), np.array([-0.5, -0.38, -0.25]), np.array([0.5, 0.38, 0.25]), resolution)
    v, f = surface.vertices, surface.faces
    n = np.zeros_like(v)
    fn = np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])
    for c in range(3):
        np.add.at(n, f[:, c], fn)
    n /= np.maximum(np.linalg.norm(n, axis=1, keepdims=True), 1e-300)
    v = v + n * rng.normal(scale=noise, size=(len(v), 1))
    intact = TriangleMesh(v, f)
    centres = v[rng.choice(len(v), holes, replace=False)]
    centroid = v[f].mean(axis=1)
    removed = (np.linalg.norm(centroid[:, None, :] - centres[None], axis=2) < hole_radius).any(axis=1)
    used = np.unique(f[~removed])
    remap = np.full(len(v), -1)
    remap[used] = np.arange(len(used))
    return Scan(TriangleMesh(v[used], remap[f[~removed]]), intact, np.flatnonzero(removed))


def subdivided(mesh: TriangleMesh, times: int) -> TriangleMesh:
    """Midpoint subdivision (each triangle into four, the surface unchanged), ``times`` over."""
    v, f = mesh.vertices, mesh.faces
    for _ in range(times):
        edges = np.sort(np.concatenate([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]]), axis=1)
        key = edges[:, 0] * len(v) + edges[:, 1]
        uniq, inverse = np.unique(key, return_inverse=True)
        mid = (v[uniq // len(v)] + v[uniq % len(v)]) / 2
        m = inverse.reshape(3, -1).T + len(v)  # midpoints of edges 01, 12, 20
        a, b, c = f[:, 0], f[:, 1], f[:, 2]
        f = np.concatenate([np.stack([a, m[:, 0], m[:, 2]], 1), np.stack([m[:, 0], b, m[:, 1]], 1),
                            np.stack([m[:, 2], m[:, 1], c], 1), np.stack([m[:, 0], m[:, 1], m[:, 2]], 1)])
        v = np.concatenate([v, mid])
    return TriangleMesh(v, f)


def open_cup(radius: float = 0.5, cut: float = 0.25, level: int = 5):
    """A sphere with its top cut away at height ``cut`` (an open cup) and the height h of the
    missing cap: the closed solid is the sphere minus that cap."""
    import trimesh

    s = trimesh.creation.icosphere(level, radius=radius)
    keep = s.triangles_center[:, 2] < cut
    used = np.unique(s.faces[keep])
    remap = np.full(len(s.vertices), -1)
    remap[used] = np.arange(len(used))
    return TriangleMesh(np.asarray(s.vertices[used]), remap[s.faces[keep]]), radius - cut


def crossed_bars():
    """Two interpenetrating boxes (a cross of two bars), each closed: one solid for a user."""
    import trimesh

    a = trimesh.creation.box(extents=(1.0, 0.2, 0.2))
    b = trimesh.creation.box(extents=(0.2, 0.2, 0.8))
    a, b = a.subdivide().subdivide(), b.subdivide().subdivide()
    v = np.concatenate([a.vertices, b.vertices])
    f = np.concatenate([a.faces, b.faces + len(a.vertices)])
    union_volume = 1.0 * 0.2 * 0.2 + 0.2 * 0.2 * 0.8 - 0.2**3  # box volumes, common practice
    return TriangleMesh(v, f), union_volume
