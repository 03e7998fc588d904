"""Exact unsigned distances from a mesh to the grid nodes near it, by scattering each triangle into its cells.

Instead of one nearest-triangle tree query per node, every triangle visits the nodes of its
bounding box grown by the band and keeps, at each node, the nearest triangle found so far
(the closest point transform of Mauch 2003, "Efficient algorithms for solving static
Hamilton-Jacobi equations", in its simplest scatter form). Nodes live in blocks of BLOCK^3,
allocated only where some triangle passes within the band, so memory grows with the surface's
area, not the box's volume. Compiled with numba (a general-purpose JIT; no extension of ours).

Besides the distance, each node keeps ``side``: the cosine between (node - closest point) and
the nearest triangle's normal, positive in front of it. On ties (the closest point on an edge or
a vertex shared by several triangles) the triangle whose normal is best aligned with the offset
wins, which gives the side of the surface for closed, consistently oriented sheets.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

#: Nodes per block side. 8^3 = 512 nodes: small enough that a block around a thin part holds
#: little empty space, large enough that the block table of a 1024^3 grid is 2.1M entries.
BLOCK = 8


@dataclass(frozen=True)
class BandDistances:
    """Distances on the band nodes of a grid whose node (i, j, k) sits at origin + cell * (i, j, k).

    table : (bx, by, bz) int32, block id of each block of BLOCK^3 nodes or -1
    blocks : (n, 3) int32, block coordinates of each allocated block
    distance : (n, B, B, B) float32, unsigned distance (unit-box lengths), inf beyond the band
    side : (n, B, B, B) float32, cosine of (node - closest point) with the nearest face normal
    face : (n, B, B, B) int32, nearest face (-1 beyond the band)
    """

    table: np.ndarray
    blocks: np.ndarray
    distance: np.ndarray
    side: np.ndarray
    face: np.ndarray
    shape: tuple

    def nodes(self) -> tuple[np.ndarray, np.ndarray]:
        """(ijk (k, 3) int64 of the band nodes, (k,) indices into the flattened block arrays)."""
        inside = np.flatnonzero(np.isfinite(self.distance.reshape(-1)))
        return flat_to_ijk(inside, self.blocks), inside


def flat_to_ijk(flat: np.ndarray, blocks: np.ndarray) -> np.ndarray:
    """Node indices (k, 3) int64 of positions in the flattened (n, B, B, B) block arrays."""
    b, local = np.divmod(flat, BLOCK**3)
    li, rest = np.divmod(local, BLOCK * BLOCK)
    lj, lk = np.divmod(rest, BLOCK)
    return blocks[b].astype(np.int64) * BLOCK + np.stack([li, lj, lk], axis=1)


@numba.njit(cache=True, fastmath=False)
def _closest(px, py, pz, ax, ay, az, bx, by, bz, cx, cy, cz):
    """Closest point on triangle abc to p (Ericson 2005, "Real-Time Collision Detection", 5.1.5)."""
    abx, aby, abz = bx - ax, by - ay, bz - az
    acx, acy, acz = cx - ax, cy - ay, cz - az
    apx, apy, apz = px - ax, py - ay, pz - az
    d1 = abx * apx + aby * apy + abz * apz
    d2 = acx * apx + acy * apy + acz * apz
    if d1 <= 0.0 and d2 <= 0.0:
        return ax, ay, az
    bpx, bpy, bpz = px - bx, py - by, pz - bz
    d3 = abx * bpx + aby * bpy + abz * bpz
    d4 = acx * bpx + acy * bpy + acz * bpz
    if d3 >= 0.0 and d4 <= d3:
        return bx, by, bz
    vc = d1 * d4 - d3 * d2
    if vc <= 0.0 and d1 >= 0.0 and d3 <= 0.0:
        v = d1 / (d1 - d3)
        return ax + v * abx, ay + v * aby, az + v * abz
    cpx, cpy, cpz = px - cx, py - cy, pz - cz
    d5 = abx * cpx + aby * cpy + abz * cpz
    d6 = acx * cpx + acy * cpy + acz * cpz
    if d6 >= 0.0 and d5 <= d6:
        return cx, cy, cz
    vb = d5 * d2 - d1 * d6
    if vb <= 0.0 and d2 >= 0.0 and d6 <= 0.0:
        w = d2 / (d2 - d6)
        return ax + w * acx, ay + w * acy, az + w * acz
    va = d3 * d6 - d5 * d4
    if va <= 0.0 and (d4 - d3) >= 0.0 and (d5 - d6) >= 0.0:
        w = (d4 - d3) / ((d4 - d3) + (d5 - d6))
        return bx + w * (cx - bx), by + w * (cy - by), bz + w * (cz - bz)
    denom = 1.0 / (va + vb + vc)
    v = vb * denom
    w = vc * denom
    return ax + abx * v + acx * w, ay + aby * v + acy * w, az + abz * v + acz * w


@numba.njit(cache=True)
def _node_box(v, f, t, origin, cell, band, shape):
    lo = np.empty(3, np.int64)
    hi = np.empty(3, np.int64)
    for a in range(3):
        mn = min(v[f[t, 0], a], v[f[t, 1], a], v[f[t, 2], a])
        mx = max(v[f[t, 0], a], v[f[t, 1], a], v[f[t, 2], a])
        lo[a] = max(0, int(np.ceil((mn - band - origin[a]) / cell)))
        hi[a] = min(shape[a] - 1, int(np.floor((mx + band - origin[a]) / cell)))
    return lo, hi


@numba.njit(cache=True)
def _mark_blocks(v, f, normals, origin, cell, band, shape, table, allowed):
    """table[b] = 1 for every allowed block a triangle's band reaches (plane test per block)."""
    half = 0.5 * np.sqrt(3.0) * BLOCK * cell
    for t in range(f.shape[0]):
        lo, hi = _node_box(v, f, t, origin, cell, band, shape)
        if lo[0] > hi[0] or lo[1] > hi[1] or lo[2] > hi[2]:
            continue
        nx, ny, nz = normals[t, 0], normals[t, 1], normals[t, 2]
        ax, ay, az = v[f[t, 0], 0], v[f[t, 0], 1], v[f[t, 0], 2]
        for bi in range(lo[0] // BLOCK, hi[0] // BLOCK + 1):
            for bj in range(lo[1] // BLOCK, hi[1] // BLOCK + 1):
                for bk in range(lo[2] // BLOCK, hi[2] // BLOCK + 1):
                    if table[bi, bj, bk] != 0 or not allowed[bi, bj, bk]:
                        continue
                    x = origin[0] + cell * (bi * BLOCK + 0.5 * (BLOCK - 1)) - ax
                    y = origin[1] + cell * (bj * BLOCK + 0.5 * (BLOCK - 1)) - ay
                    z = origin[2] + cell * (bk * BLOCK + 0.5 * (BLOCK - 1)) - az
                    if abs(x * nx + y * ny + z * nz) <= band + half:
                        table[bi, bj, bk] = 1


@numba.njit(cache=True, parallel=True)
def _scatter(v, f, normals, origin, cell, band, shape, table, dist2, side, face, slabs):
    """Every triangle into the nodes within ``band`` of it, keeping each node's nearest. The grid
    is cut into ``slabs`` slabs along z that run on all threads; each node takes the triangles in
    their order in either case, so the result is a single thread's (a 35k-vertex scan at 384
    cells: 1.4 s on one thread for both grids of its fit)."""
    width = (shape[2] + slabs - 1) // slabs
    for s in numba.prange(slabs):
        _scatter_slab(v, f, normals, origin, cell, band, shape, table, dist2, side, face, s * width,
                      min(shape[2], (s + 1) * width) - 1)


@numba.njit(cache=True)
def _scatter_slab(v, f, normals, origin, cell, band, shape, table, dist2, side, face, k_first, k_last):
    band2 = band * band
    for t in range(f.shape[0]):
        lo, hi = _node_box(v, f, t, origin, cell, band, shape)
        if hi[2] < k_first or lo[2] > k_last:
            continue
        lo[2] = max(lo[2], k_first)
        hi[2] = min(hi[2], k_last)
        ax, ay, az = v[f[t, 0], 0], v[f[t, 0], 1], v[f[t, 0], 2]
        bx, by, bz = v[f[t, 1], 0], v[f[t, 1], 1], v[f[t, 1], 2]
        cx, cy, cz = v[f[t, 2], 0], v[f[t, 2], 1], v[f[t, 2], 2]
        nx, ny, nz = normals[t, 0], normals[t, 1], normals[t, 2]
        for i in range(lo[0], hi[0] + 1):
            px = origin[0] + cell * i
            for j in range(lo[1], hi[1] + 1):
                py = origin[1] + cell * j
                for k in range(lo[2], hi[2] + 1):
                    b = table[i // BLOCK, j // BLOCK, k // BLOCK]
                    if b < 0:
                        continue
                    pz = origin[2] + cell * k
                    plane = (px - ax) * nx + (py - ay) * ny + (pz - az) * nz
                    if plane * plane > band2:
                        continue
                    li, lj, lk = i % BLOCK, j % BLOCK, k % BLOCK
                    best = dist2[b, li, lj, lk]
                    if plane * plane > best:
                        continue
                    qx, qy, qz = _closest(px, py, pz, ax, ay, az, bx, by, bz, cx, cy, cz)
                    dx, dy, dz = px - qx, py - qy, pz - qz
                    d2 = dx * dx + dy * dy + dz * dz
                    if d2 > band2 or d2 > best * (1.0 + 1e-9) + 1e-30:
                        continue
                    cos = (dx * nx + dy * ny + dz * nz) / np.sqrt(max(d2, 1e-300))
                    if d2 < best * (1.0 - 1e-9) or abs(cos) > abs(side[b, li, lj, lk]):
                        dist2[b, li, lj, lk] = d2
                        side[b, li, lj, lk] = cos
                        face[b, li, lj, lk] = t


@numba.njit(cache=True)
def _try_face(v, f, normals, t, px, py, pz, b, li, lj, lk, band2, dist2, side, face):
    ax, ay, az = v[f[t, 0], 0], v[f[t, 0], 1], v[f[t, 0], 2]
    qx, qy, qz = _closest(px, py, pz, ax, ay, az, v[f[t, 1], 0], v[f[t, 1], 1], v[f[t, 1], 2],
                          v[f[t, 2], 0], v[f[t, 2], 1], v[f[t, 2], 2])
    dx, dy, dz = px - qx, py - qy, pz - qz
    d2 = dx * dx + dy * dy + dz * dz
    best = dist2[b, li, lj, lk]
    if d2 > band2 or d2 > best * (1.0 + 1e-9) + 1e-30:
        return
    cos = (dx * normals[t, 0] + dy * normals[t, 1] + dz * normals[t, 2]) / np.sqrt(max(d2, 1e-300))
    if d2 < best * (1.0 - 1e-9) or abs(cos) > abs(side[b, li, lj, lk]):
        dist2[b, li, lj, lk] = d2
        side[b, li, lj, lk] = cos
        face[b, li, lj, lk] = t


@numba.njit(cache=True)
def _propagate(v, f, normals, origin, cell, band, shape, table, blocks, dist2, side, face, backward, settled_within):
    """One sweep: every node tries the nearest faces of its six neighbours (in place, so a
    forward and a backward sweep carry a face across the band). Nodes within ``settled_within``
    of their face got the exact nearest from the scatter (it tested every triangle that near)."""
    band2 = band * band
    settled = settled_within * settled_within
    n = blocks.shape[0]
    sx, sy, sz = shape[0], shape[1], shape[2]
    for q in range(n):
        b = n - 1 - q if backward else q
        for r in range(BLOCK * BLOCK * BLOCK):
            rr = BLOCK * BLOCK * BLOCK - 1 - r if backward else r
            li, lj, lk = rr // (BLOCK * BLOCK), (rr // BLOCK) % BLOCK, rr % BLOCK
            i, j, k = blocks[b, 0] * BLOCK + li, blocks[b, 1] * BLOCK + lj, blocks[b, 2] * BLOCK + lk
            if i >= sx or j >= sy or k >= sz:  # the padding of blocks past the grid's end
                continue
            if dist2[b, li, lj, lk] <= settled:  # the scatter's own nearest: no face is nearer
                continue
            px, py, pz = origin[0] + cell * i, origin[1] + cell * j, origin[2] + cell * k
            for a in range(6):
                ni, nj, nk = i, j, k
                if a == 0:
                    ni -= 1
                elif a == 1:
                    ni += 1
                elif a == 2:
                    nj -= 1
                elif a == 3:
                    nj += 1
                elif a == 4:
                    nk -= 1
                else:
                    nk += 1
                if ni < 0 or nj < 0 or nk < 0 or ni >= sx or nj >= sy or nk >= sz:
                    continue
                nb = table[ni // BLOCK, nj // BLOCK, nk // BLOCK]
                if nb < 0:
                    continue
                t = face[nb, ni % BLOCK, nj % BLOCK, nk % BLOCK]
                if t < 0 or t == face[b, li, lj, lk]:
                    continue
                _try_face(v, f, normals, t, px, py, pz, b, li, lj, lk, band2, dist2, side, face)


@numba.njit(cache=True, parallel=True)
def _descend(v, f, normals, origin, cell, band, blocks, dist2, side, face, vf_start, vf_faces, settled_within):
    """Greedy walk of each node's nearest face over faces sharing a vertex, until no neighbour
    is nearer: the spread faces are a cell or so off, the walk finds the true nearest. Each node
    reads and writes only its own entries, so blocks run on all threads (the same result as one
    thread; on the 3.0M-face scan 13.1 s on one thread)."""
    band2 = band * band
    settled = settled_within * settled_within
    for b in numba.prange(blocks.shape[0]):
        for li in range(BLOCK):
            for lj in range(BLOCK):
                for lk in range(BLOCK):
                    t = face[b, li, lj, lk]
                    if t < 0 or dist2[b, li, lj, lk] <= settled:  # no walk needed from the exact nearest
                        continue
                    px = origin[0] + cell * (blocks[b, 0] * BLOCK + li)
                    py = origin[1] + cell * (blocks[b, 1] * BLOCK + lj)
                    pz = origin[2] + cell * (blocks[b, 2] * BLOCK + lk)
                    for _ in range(256):
                        # the ring of the face's corner nearest the node first; the other two
                        # corners' rings only when it brings nothing (a walk ends there)
                        near, nd = 0, 1e300
                        for c in range(3):
                            u = f[t, c]
                            d = (v[u, 0] - px) ** 2 + (v[u, 1] - py) ** 2 + (v[u, 2] - pz) ** 2
                            if d < nd:
                                near, nd = c, d
                        for c in (near, (near + 1) % 3, (near + 2) % 3):
                            u = f[t, c]
                            for q in range(vf_start[u], vf_start[u + 1]):
                                _try_face(v, f, normals, vf_faces[q], px, py, pz, b, li, lj, lk, band2, dist2, side, face)
                            if face[b, li, lj, lk] != t:
                                break
                        if face[b, li, lj, lk] == t:
                            break
                        t = face[b, li, lj, lk]


def _vertex_faces(n_vertices: int, f: np.ndarray):
    """CSR of the faces around each vertex, in face order: (start (n+1,), faces (3m,))."""
    counts = np.bincount(f.reshape(-1), minlength=n_vertices)
    start = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    return start, _fill_vertex_faces(f, start)


@numba.njit(cache=True)
def _fill_vertex_faces(f, start):
    """Counting sort of the corners by vertex (one pass, stable: the same order as a stable argsort)."""
    at = start[:-1].copy()
    out = np.empty(f.shape[0] * 3, np.int64)
    for t in range(f.shape[0]):
        for c in range(3):
            u = f[t, c]
            out[at[u]] = t
            at[u] += 1
    return out


#: Above this many triangle-node pairs for a full-band scatter (72M took 3.0 s against 10.8 s by
#: spreading, measured on a 35k-vertex scan at 384 cells), triangles scatter
#: only into the nodes within one cell and their faces spread through the band by sweeps.
MAX_SCATTER_PAIRS = 300_000_000
#: z slabs per thread of the parallel scatter (a scan's surface is spread unevenly along z).
SLABS_PER_THREAD = 4
#: Forward and backward sweeps of the spreading pass (each reaches farther than a cell).
SWEEPS = 2


#: Above this many faces the triangles (and their vertices) are renumbered in the order of the
#: grid's blocks before scattering, so each kernel reads neighbouring memory: a scan's faces are
#: stored in scanning or subdivision order, scattered over the grid (3.0M-face scan: fit 54.7 -> 51.0 s, measured).
SPATIAL_ORDER_FACES = 200_000


def _in_block_order(v, f, origin, cell: float, nb) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(vertices, faces, order): faces sorted by the grid block of their first corner (stable),
    vertices renumbered by first use in that order (unused ones dropped); order[new] = old face."""
    corner = np.clip(np.floor((v[f[:, 0]] - origin) / (cell * BLOCK)).astype(np.int64), 0, np.asarray(nb) - 1)
    key = (corner[:, 0] * nb[1] + corner[:, 1]) * nb[2] + corner[:, 2]
    order = np.argsort(key, kind="stable")
    faces, kept = _renumber_by_first_use(f[order], len(v))
    return np.ascontiguousarray(v[kept]), faces, order


@numba.njit(cache=True)
def _renumber_by_first_use(f, n_vertices):
    new = np.full(n_vertices, -1, np.int64)
    kept = np.empty(n_vertices, np.int64)
    out = np.empty_like(f)
    k = 0
    for t in range(f.shape[0]):
        for c in range(3):
            u = f[t, c]
            if new[u] < 0:
                new[u] = k
                kept[k] = u
                k += 1
            out[t, c] = new[u]
    return out, kept[:k]


@numba.njit(cache=True)
def _scatter_pairs(v, f, cell, band) -> float:
    """Triangle-node pairs a full-band scatter would test: the nodes of each triangle's box grown by the band."""
    total = 0.0
    for t in range(f.shape[0]):
        pairs = 1.0
        for a in range(3):
            lo = min(v[f[t, 0], a], v[f[t, 1], a], v[f[t, 2], a])
            hi = max(v[f[t, 0], a], v[f[t, 1], a], v[f[t, 2], a])
            pairs *= np.floor((hi - lo + 2 * band) / cell) + 1
        total += pairs
    return total


@numba.njit(cache=True)
def _to_faces(p, ids, v, f):
    out = np.empty(p.shape[0])
    for q in range(p.shape[0]):
        t = ids[q]
        qx, qy, qz = _closest(p[q, 0], p[q, 1], p[q, 2], v[f[t, 0], 0], v[f[t, 0], 1], v[f[t, 0], 2],
                              v[f[t, 1], 0], v[f[t, 1], 1], v[f[t, 1], 2], v[f[t, 2], 0], v[f[t, 2], 1], v[f[t, 2], 2])
        out[q] = np.sqrt((p[q, 0] - qx) ** 2 + (p[q, 1] - qy) ** 2 + (p[q, 2] - qz) ** 2)
    return out


@numba.njit(cache=True)
def _face_distance2(px, py, pz, v, f, t):
    qx, qy, qz = _closest(px, py, pz, v[f[t, 0], 0], v[f[t, 0], 1], v[f[t, 0], 2],
                          v[f[t, 1], 0], v[f[t, 1], 1], v[f[t, 1], 2], v[f[t, 2], 0], v[f[t, 2], 1], v[f[t, 2], 2])
    return (px - qx) ** 2 + (py - qy) ** 2 + (pz - qz) ** 2


@numba.njit(cache=True)
def _walk_points(p, ids, v, f, vf_start, vf_faces, limit):
    """Greedy walk from each point's given face over faces sharing a vertex (as _descend), for
    points nearer than ``limit``; returns the distances."""
    out = np.empty(p.shape[0])
    for q in range(p.shape[0]):
        px, py, pz = p[q, 0], p[q, 1], p[q, 2]
        t = ids[q]
        best = _face_distance2(px, py, pz, v, f, t)
        if best <= limit * limit:
            for _ in range(256):
                start = t
                for c in range(3):
                    u = f[start, c]
                    for r in range(vf_start[u], vf_start[u + 1]):
                        d = _face_distance2(px, py, pz, v, f, vf_faces[r])
                        if d < best * (1.0 - 1e-12):
                            best, t = d, vf_faces[r]
                if t == start:
                    break
        out[q] = np.sqrt(best)
    return out


def distance_to_faces(points: np.ndarray, face_ids: np.ndarray, vertices: np.ndarray, faces: np.ndarray,
                      walk_within: float = 0.0) -> np.ndarray:
    """(n,) distance from each point (n, 3) to a given triangle each (face_ids (n,)); points nearer
    than ``walk_within`` walk on to the nearest triangle from there (exact on smooth surfaces)."""
    p = np.ascontiguousarray(points, dtype=np.float64)
    ids = np.ascontiguousarray(face_ids, dtype=np.int64)
    v = np.ascontiguousarray(vertices, dtype=np.float64)
    f = np.ascontiguousarray(faces, dtype=np.int64)
    if walk_within <= 0:
        return _to_faces(p, ids, v, f)
    start, around = _vertex_faces(len(v), f)
    return _walk_points(p, ids, v, f, start, around, float(walk_within))


def unit_normals(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(m, 3) float64 unit face normals (zero for degenerate faces)."""
    return _unit_normals(np.ascontiguousarray(vertices, dtype=np.float64), np.ascontiguousarray(faces, dtype=np.int64))


@numba.njit(cache=True, parallel=True)
def _unit_normals(v, f):
    out = np.empty((f.shape[0], 3))
    for t in numba.prange(f.shape[0]):
        a, b, c = f[t, 0], f[t, 1], f[t, 2]
        ux, uy, uz = v[b, 0] - v[a, 0], v[b, 1] - v[a, 1], v[b, 2] - v[a, 2]
        wx, wy, wz = v[c, 0] - v[a, 0], v[c, 1] - v[a, 1], v[c, 2] - v[a, 2]
        nx, ny, nz = uy * wz - uz * wy, uz * wx - ux * wz, ux * wy - uy * wx
        length = max(np.sqrt(nx * nx + ny * ny + nz * nz), 1e-300)
        out[t, 0], out[t, 1], out[t, 2] = nx / length, ny / length, nz / length
    return out


def band_distances(vertices, faces, origin, cell: float, shape, band: float, allowed: np.ndarray | None = None) -> BandDistances:
    """Unsigned distances at every node within ``band`` (unit-box length) of the mesh.

    vertices : (n, 3) float64, faces : (m, 3) int64 (unit box); origin : (3,) position of node 0;
    shape : nodes per axis; allowed : optional (bx, by, bz) bool, the blocks that may be filled.
    """
    v = np.ascontiguousarray(vertices, dtype=np.float64)
    f = np.ascontiguousarray(faces, dtype=np.int64)
    origin = np.asarray(origin, dtype=np.float64)
    shape = np.asarray(shape, dtype=np.int64)
    nb = tuple(int(s) for s in (shape + BLOCK - 1) // BLOCK)
    order = None
    if len(f) > SPATIAL_ORDER_FACES:
        v, f, order = _in_block_order(v, f, origin, float(cell), nb)
    if allowed is None:
        allowed = np.ones(nb, dtype=np.bool_)
    normals = unit_normals(v, f)
    table = np.zeros(nb, dtype=np.int32)
    _mark_blocks(v, f, normals, origin, float(cell), float(band), shape, table, allowed)
    blocks = np.argwhere(table > 0).astype(np.int32)
    table[:] = -1
    table[tuple(blocks.T)] = np.arange(len(blocks), dtype=np.int32)
    n = len(blocks)
    dist2 = np.full((n, BLOCK, BLOCK, BLOCK), np.inf, dtype=np.float64)
    side = np.zeros((n, BLOCK, BLOCK, BLOCK), dtype=np.float32)
    face = np.full((n, BLOCK, BLOCK, BLOCK), -1, dtype=np.int32)
    slabs = SLABS_PER_THREAD * numba.get_num_threads()
    if _scatter_pairs(v, f, cell, band) <= MAX_SCATTER_PAIRS:
        _scatter(v, f, normals, origin, float(cell), float(band), shape, table, dist2, side, face, slabs)
    else:  # many triangles per cell (a scan): near nodes by scatter, the rest by spreading faces
        near = float(min(band, cell))
        _scatter(v, f, normals, origin, float(cell), near, shape, table, dist2, side, face, slabs)
        for _ in range(SWEEPS):
            for backward in (False, True):
                _propagate(v, f, normals, origin, float(cell), float(band), shape, table, blocks, dist2, side, face,
                           backward, near)
        start, around = _vertex_faces(len(v), f)
        _descend(v, f, normals, origin, float(cell), float(band), blocks, dist2, side, face, start, around, near)
    if order is not None:  # back to the caller's face numbers
        face = np.where(face >= 0, order[np.maximum(face, 0)], -1).astype(np.int32)
    used = np.isfinite(dist2).reshape(n, -1).any(axis=1)
    if not used.all():  # blocks the plane test let through but no node of which lies in the band
        blocks, dist2, side, face = blocks[used], dist2[used], side[used], face[used]
        table[:] = -1
        table[tuple(blocks.T)] = np.arange(len(blocks), dtype=np.int32)
    return BandDistances(table, blocks, np.sqrt(dist2).astype(np.float32), side, face, tuple(int(s) for s in shape))


def dense_band(band: BandDistances) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(distance, side, face) as dense arrays of the grid's shape (small grids only)."""
    shape = band.shape
    padded = tuple(int(s) for s in np.array(band.table.shape) * BLOCK)
    out = []
    for arr, fill in ((band.distance, np.inf), (band.side, 0.0), (band.face, -1)):
        dense = np.full(padded, fill, dtype=arr.dtype)
        view = dense.reshape(band.table.shape[0], BLOCK, band.table.shape[1], BLOCK, band.table.shape[2], BLOCK)
        b = band.blocks
        view[b[:, 0], :, b[:, 1], :, b[:, 2], :] = arr
        out.append(dense[: shape[0], : shape[1], : shape[2]])
    return tuple(out)
