"""Crease restoration on an extracted mesh: put back the sharp edges a sampled field rounds off.

A field stored on a grid cannot hold an edge sharper than about one grid cell, and marching
cubes cuts across whatever is left, so a crisp crease comes out as a rounded strip one or
two cells wide. Where the mesh shows such a strip between two flat sides, each face in the
strip takes the normal of the most consistent patch that contains it (guided normal
filtering: Zhang, Deng, Zhang, Bouaziz, Liu & Wang 2015, "Guided mesh normal filtering");
patches on either side are flat, so the strip splits between the two side normals. The
vertices then move to fit those normals (the vertex update of Sun, Rosin, Martin & Langbein
2007, "Fast and effective feature-preserving mesh denoising"), which lays them on the planes
of the sides and on their intersection line.

A smoothly curved region is left alone: there every patch is about as consistent as the one
centred on the face, so no patch stands out (the acceptance ratio below). Lumpy organic
surfaces are another matter: their lumps offer patches of unequal consistency, and the plane
fit leaves needle-shaped triangles there (measured on the demo's smoothed stone: 1,726 faces
turned more than 40 degrees from one of their corners' normals, against none before). That is why
the smooth task's default ("auto") asks for flat sides: a crease is restored only where the data
shows two planar sides meeting, which a lumpy scan does not have.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..mesh.types import TriangleMesh
from ..callbacks import check_stop, never_stop

#: A face's own patch must spread its normals by more than this (as 1 - cos of a mean
#: angle) to count as straddling a crease...
MIN_SPREAD_DEGREES = 3.0
#: ...and the best patch containing it must spread them less than this fraction of that.
ACCEPT_RATIO = 0.5
#: With flat_sides_only (the smooth task's "auto" creases) the guiding patch must be flat: its
#: normals' spread below that of a 2.5-degree mean angle. The sides of a hard-surface crease are
#: planes; the lumps of an organic scan, or a sphere of radius 0.4 seen through a patch of 0.03
#: (spread of a 2.1-degree mean angle), are not, and are left alone (no needle triangles).
FLAT_SIDE_DEGREES = 1.5
#: ...or far flatter than the face's own patch (a noisy hard-surface side after smoothing keeps a
#: degree or two of scatter, but next to a crease it is still several times flatter than the
#: strip; on a sphere or a lump no patch is).
FLAT_SIDE_RATIO = 0.2
#: Conjugate-gradient iterations of the vertex fit to the target planes.
PLANE_FIT_ITERATIONS = 60
#: Patch centres sit in cubes of this fraction of the patch radius.
BUCKET_FRACTION = 0.25
#: A triangle whose normal turns by more than acos(FOLD_COSINE) has folded; its corners'
#: moves are halved up to FOLD_HALVINGS times, then cancelled.
FOLD_COSINE = 0.0
FOLD_HALVINGS = 6
#: ...and so has one left with less than this fraction of its area, or one whose normal ends
#: farther from its target than it started, by more than TURN_AWAY_DEGREES.
MIN_AREA_KEPT = 0.02
TURN_AWAY_DEGREES = 45.0
#: Weight of staying put against fitting the planes (fixes the free sliding along them).
STAY = 1e-3


@dataclass(frozen=True)
class CreaseReport:
    faces_guided: int
    vertices_moved: int
    largest_move: float


def _normals_areas(v: np.ndarray, f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    n = np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])
    length = np.linalg.norm(n, axis=1)
    return n / np.maximum(length, 1e-300)[:, None], 0.5 * length


def _buckets(c: np.ndarray, n: np.ndarray, a: np.ndarray, size: float):
    """Group faces into cubes of side `size`.

    Returns (bucket of each face (F,), integer cube of each bucket (B, 3), area-weighted centre
    (B, 3), area-weighted normal sum (B, 3), area (B,)).
    """
    key = np.floor((c - c.min(axis=0)) / size).astype(np.int64)
    span = key.max(axis=0) + 1
    linear, bucket = np.unique((key[:, 0] * span[1] + key[:, 1]) * span[2] + key[:, 2], return_inverse=True)
    count = len(linear)
    cube = np.stack(np.unravel_index(linear, tuple(span)), axis=1)
    area = np.bincount(bucket, weights=a, minlength=count)
    centre = np.stack([np.bincount(bucket, weights=a * c[:, i], minlength=count) for i in range(3)], axis=1)
    normal_sum = np.stack([np.bincount(bucket, weights=a * n[:, i], minlength=count) for i in range(3)], axis=1)
    return bucket, cube, centre / np.maximum(area, 1e-300)[:, None], normal_sum, area


def _guides(c: np.ndarray, n: np.ndarray, a: np.ndarray, radius: float, flat_sides_only: bool = False):
    """Per face: (guide normal, accepted).

    Faces are grouped in cubes of side radius / 4. A patch is the faces of the cubes whose
    centres lie within `radius` of a cube's centre; its mean normal and spread (area-weighted
    mean of 1 - cos(angle to the mean)) follow exactly from per-cube sums of a * n. Each cube
    offers as guide the mean normal of the most consistent patch within reach. A face picks,
    among the guides offered by its own and the 26 neighbouring cubes, the one closest to its
    own normal, so a rounded strip splits at its middle, face by face.
    """
    import scipy.sparse
    from scipy.spatial import cKDTree

    bucket, cube, centre, normal_sum, area = _buckets(c, n, a, BUCKET_FRACTION * radius)
    count = len(area)
    pairs = cKDTree(centre).query_pairs(radius, output_type="ndarray")
    rows = np.concatenate([pairs[:, 0], pairs[:, 1], np.arange(count)])
    cols = np.concatenate([pairs[:, 1], pairs[:, 0], np.arange(count)])
    near = scipy.sparse.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(count, count))
    patch_normal = near @ normal_sum
    length = np.linalg.norm(patch_normal, axis=1)
    mean = patch_normal / np.maximum(length, 1e-300)[:, None]
    spread = 1.0 - length / np.maximum(near @ area, 1e-300)
    # the most consistent patch within reach of each cube
    row_of = np.repeat(np.arange(count), np.diff(near.indptr))
    candidate = spread[near.indices]
    best_spread = np.minimum.reduceat(candidate, near.indptr[:-1])
    at_best = np.flatnonzero(candidate == best_spread[row_of])
    best = near.indices[at_best[np.unique(row_of[at_best], return_index=True)[1]]]
    offered = mean[best]
    # each face: the offered guide closest to its normal, among the 27 cubes around its own
    lookup = np.full(tuple(cube.max(axis=0) + 3), -1, dtype=np.int64)
    lookup[tuple((cube + 1).T)] = np.arange(count)
    home = cube[bucket] + 1
    guide = offered[bucket].copy()
    guide_spread = best_spread[bucket].copy()
    closeness = (n * guide).sum(1)
    for offset in np.ndindex(3, 3, 3):
        other = lookup[tuple((home + np.array(offset) - 1).T)]
        valid = other >= 0
        dot = np.where(valid, (n * offered[np.maximum(other, 0)]).sum(1), -2.0)
        better = dot > closeness
        closeness = np.where(better, dot, closeness)
        guide[better] = offered[other[better]]
        guide_spread[better] = best_spread[other[better]]
    own = spread[bucket]
    accepted = (own > 1.0 - np.cos(np.radians(MIN_SPREAD_DEGREES))) & (guide_spread < ACCEPT_RATIO * own)
    if flat_sides_only:
        accepted &= (guide_spread < 1.0 - np.cos(np.radians(FLAT_SIDE_DEGREES))) | (guide_spread < FLAT_SIDE_RATIO * own)
    return guide, accepted


def _fit_planes(v: np.ndarray, faces: np.ndarray, target: np.ndarray, movable: np.ndarray, should_stop) -> np.ndarray:
    """Displacements (V, 3) that best lay each face's corners on the plane through its
    centroid with the target normal: minimise sum_f sum_k (t_f . (x_k - c_f))^2 + STAY |d|^2
    over the movable vertices, by conjugate gradients (the energy of Sun et al. 2007's vertex
    update, whose plain sweeps converge far more slowly; STAY fixes the sliding along planes).
    """
    import scipy.sparse

    corner_to_vertex = scipy.sparse.csr_matrix(
        (np.ones(3 * len(faces)), (faces.T.reshape(-1), np.arange(3 * len(faces)))), shape=(len(v), 3 * len(faces))
    )
    mask = movable[:, None].astype(np.float64)

    def gradient_part(x: np.ndarray) -> np.ndarray:
        """H x for the plane term (half its gradient at x), movable rows only."""
        corners = x[faces.T]  # (3, F, 3)
        height = np.einsum("ij,kij->ki", target, corners - (corners[0] + corners[1] + corners[2]) / 3.0)
        return mask * (corner_to_vertex @ (height[:, :, None] * target[None]).reshape(-1, 3))

    degree = np.maximum(np.bincount(faces.reshape(-1), minlength=len(v)).astype(np.float64), 1.0)[:, None]
    d = np.zeros_like(v)
    r = -gradient_part(v)
    z = r / degree
    p = z.copy()
    rz = float((r * z).sum())
    scale = rz
    for _ in range(PLANE_FIT_ITERATIONS):
        check_stop(should_stop, "crease restoration")
        hp = gradient_part(p) + STAY * mask * p
        alpha = rz / max(float((p * hp).sum()), 1e-300)
        d += alpha * p
        r -= alpha * hp
        z = r / degree
        rz_new = float((r * z).sum())
        if rz_new < 1e-12 * scale:
            break
        p = z + (rz_new / rz) * p
        rz = rz_new
    return d


def _without_folds(v: np.ndarray, d: np.ndarray, faces: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Displacements shortened where they would spoil a triangle: turn it over, squash it, or
    turn it away from its target normal by more than it started. The corners of such a
    triangle go half as far, FOLD_HALVINGS times at most, then stay put."""
    before, area_before = _normals_areas(v, faces)
    allowed = np.arccos(np.clip((before * target).sum(1), -1.0, 1.0)) + np.radians(TURN_AWAY_DEGREES)
    d = d.copy()
    halvings = 0
    while True:
        after, area_after = _normals_areas(v + d, faces)
        away = np.arccos(np.clip((after * target).sum(1), -1.0, 1.0)) > allowed
        bad = ((after * before).sum(1) <= FOLD_COSINE) | (area_after < MIN_AREA_KEPT * area_before) | away
        if not bad.any():
            return d
        corners = np.unique(faces[bad].reshape(-1))
        d[corners] *= 0.5 if halvings < FOLD_HALVINGS else 0.0
        halvings += 1


def restore_creases(mesh: TriangleMesh, radius: float, should_stop=never_stop, flat_sides_only: bool = False
                    ) -> tuple[TriangleMesh, CreaseReport]:
    """Sharpen rounded creases of a marching-cubes mesh; smooth regions stay as they are.

    radius : patch radius (mesh units), about 1.5 times the width of the rounding, i.e. of
        the field's grid cell
    flat_sides_only : restore only creases whose sides are flat (FLAT_SIDE_DEGREES): what the
        data says is a hard-surface crease; lumpy organic regions are left alone
    """
    v = mesh.vertices.astype(np.float64).copy()
    f = mesh.faces
    n, a = _normals_areas(v, f)
    guide, accepted = _guides(v[f].mean(axis=1), n, a, radius, flat_sides_only)
    guided = np.flatnonzero(accepted)
    if not len(guided):
        return mesh, CreaseReport(0, 0, 0.0)
    movable = np.zeros(len(v), dtype=bool)
    movable[f[guided].reshape(-1)] = True
    # only the faces around movable vertices take part in the update
    local = np.flatnonzero(movable[f].any(axis=1))
    lf = f[local]
    target = n[local]
    target[accepted[local]] = guide[local][accepted[local]]
    start = v.copy()
    d = _fit_planes(v, lf, target, movable, should_stop)
    v = start + _without_folds(start, d, lf, target)
    moved = np.linalg.norm(v - start, axis=1)
    out = TriangleMesh(v, f, dict(mesh.vertex_values))
    return out, CreaseReport(int(len(guided)), int(movable.sum()), float(moved.max()))
