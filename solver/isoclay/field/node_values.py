"""Signed distances at the nodes of the field's grids: the coarse dense grid and the fine blocks.

Coarse grid (every node): exact distances in a band around the surface (distances.py), signed by
winding numbers; far nodes get an upper bound (nearest band node's distance plus the way there,
by a Euclidean distance transform) and the sign of a winding number interpolated from a lattice
four times coarser, asked again where it is near 1/2. Where the sign flips between two nodes
that the mesh does not pass between (a hole), the fill surface is where the winding number
crosses 1/2 (Jacobson et al. 2013); nodes near it take their distance to it, so the fill is a
smooth membrane over the hole instead of a step at a grid cell.

Fine blocks (only where refined): exact distances in a band, the sign from the side of the
nearest triangle (no winding numbers: these nodes are all near the mesh), except beyond open
rims, where the coarse field's sign and membrane hold.
"""

from __future__ import annotations

import numpy as np
import scipy.ndimage

from ..callbacks import check_stop, never_stop, no_progress
from .distances import BLOCK, band_distances, dense_band, distance_to_faces
from .winding import WindingNumbers

#: Lattice step (coarse cells) of the far-field winding numbers; asked again where the
#: interpolated value lies within FAR_AMBIGUOUS of 1/2.
FAR_STEP = 4
FAR_AMBIGUOUS = 0.3
#: Far nodes nearer than this many cells walk to their true nearest triangle (farther ones keep the
#: nearest band node's, off by less than (offset / distance)^2 / 2 of the distance).
FAR_WALK_CELLS = 6.0
#: A fine node whose triangle's side and the coarse field's sign disagree while the coarse field
#: is farther than this many fine cells from zero asks a winding number.
DOUBT_CELLS = 2.0
#: In blocks where two parts meet, nodes nearer the mesh than this many fine cells, or whose
#: triangle's side and the coarse field disagree, ask a winding number.
JUNCTION_CELLS = 1.5
#: A node whose offset from its nearest triangle makes a cosine below this with the normal
#: lies beyond an edge of the mesh (a rim): its side is not the triangle's to say.
RIM_COSINE = 0.3


def coarse_node_values(vertices, faces, resolution: int, half_extent: float, band_cells: float,
                       winding: WindingNumbers, several_sheets: bool, progress=no_progress, should_stop=never_stop):
    """Signed distances (S, S, S) float64 at the SplineSDF nodes (S = resolution + 3) and the count of
    exact distances.

    several_sheets : the mesh has open rims or several parts (walls may lie inside other parts):
        band nodes then take their sign from winding numbers, else from their nearest triangle.
    Far nodes: each connected region of them takes the sign of the band nodes around it when
    those agree (a closed surface); a region reaching through a hole asks winding numbers.
    """
    h = 2.0 * half_extent / resolution
    side_n = resolution + 3
    origin = np.full(3, -half_extent - h)
    bd = band_distances(vertices, faces, origin, h, (side_n,) * 3, band_cells * h)
    check_stop(should_stop, "distance")
    dist, side, nearest_face = dense_band(bd)
    dist = dist.astype(np.float64)
    band = np.isfinite(dist)
    progress("distance", 0.3, {"grid": resolution, "band_nodes": int(band.sum())})

    def points_of(flat):
        i, j, k = np.unravel_index(flat, dist.shape)
        out = np.empty((len(flat), 3))
        out[:, 0], out[:, 1], out[:, 2] = i, j, k
        out *= h
        out += origin
        return out

    inside = side < 0
    w = np.where(inside, 1.0, 0.0)
    ask = np.flatnonzero(band & ((np.abs(side) < RIM_COSINE) if not several_sheets else True))
    if len(ask):
        w.reshape(-1)[ask] = winding(points_of(ask))
        trusted = dist.reshape(-1)[ask] >= winding.tolerance
        if several_sheets:
            trusted |= np.abs(side.reshape(-1)[ask]) < RIM_COSINE
        inside.reshape(-1)[ask[trusted]] = w.reshape(-1)[ask[trusted]] > 0.5
        # a wall inside another part (or a flap in the open): its distance is not the solid's;
        # such nodes count as far and take the distance of the solid's own surface
        s_ask = side.reshape(-1)[ask]
        hidden = ask[trusted & (np.abs(s_ask) >= RIM_COSINE) & ((s_ask < 0) != inside.reshape(-1)[ask])]
        band.reshape(-1)[hidden] = False

    # far regions: the sign of the band around them, or winding numbers where that is mixed
    labels, count = scipy.ndimage.label(~band)
    votes_in = np.zeros(count + 1)
    votes_all = np.zeros(count + 1)
    for axis in range(3):
        for lo, hi in ((slice(0, -1), slice(1, None)), (slice(1, None), slice(0, -1))):
            a = [slice(None)] * 3
            b = [slice(None)] * 3
            a[axis], b[axis] = lo, hi
            edge = band[tuple(a)] & ~band[tuple(b)]
            lab = labels[tuple(b)][edge]
            votes_all += np.bincount(lab, minlength=count + 1)
            votes_in += np.bincount(lab, weights=inside[tuple(a)][edge], minlength=count + 1)
    share = votes_in / np.maximum(votes_all, 1)
    pure = (share < 0.01) | (share > 0.99)
    pure[0] = True
    far_inside = share > 0.5
    inside[~band] = far_inside[labels[~band]]
    w[~band] = far_inside[labels[~band]].astype(np.float64)
    mixed = ~pure[labels] & ~band
    if mixed.any():
        inside_mixed, w_mixed = _far_winding(mixed, origin, h, winding)
        inside[mixed] = inside_mixed
        w[mixed] = w_mixed
    del labels
    check_stop(should_stop, "distance")
    progress("distance", 0.6, {"grid": resolution, "winding_queries": winding.queries})

    # far nodes: the distance to the nearest band node's nearest triangle (the way through
    # that node is an upper bound; the triangle itself is almost always the nearest one)
    nearest = scipy.ndimage.distance_transform_edt(~band, return_distances=False, return_indices=True)
    far = np.flatnonzero(~band)
    via = tuple(n.reshape(-1)[far] for n in nearest)
    del nearest
    magnitude = dist.copy()
    magnitude.reshape(-1)[far] = distance_to_faces(points_of(far), nearest_face[via], vertices, faces, FAR_WALK_CELLS * h)
    del via, far
    if mixed.any():
        magnitude = _membrane(magnitude, inside, w, h)
    values = np.where(inside, -magnitude, magnitude)
    progress("distance", 0.7, {"grid": resolution})
    return values, int(band.sum())


def _far_winding(mask: np.ndarray, origin, h: float, winding: WindingNumbers):
    """Winding numbers at the masked nodes: on a lattice FAR_STEP times coarser, interpolated, and
    asked again where the interpolation lies within FAR_AMBIGUOUS of 1/2. Returns (inside, w)."""
    side_n = mask.shape[0]
    sub = np.unique(np.concatenate([np.arange(0, side_n, FAR_STEP), [side_n - 1]]))
    axis = origin[0] + h * np.arange(side_n)
    lattice = np.stack(np.meshgrid(axis[sub], axis[sub], axis[sub], indexing="ij"), axis=-1).reshape(-1, 3)
    w_lattice = winding(lattice).reshape((len(sub),) * 3)
    flat = np.flatnonzero(mask)
    # trilinear interpolation is linear interpolation along each axis in turn: three small matrix
    # products over the whole grid (0.02 s at 131^3 against 0.22 s pointwise, same values)
    position = np.interp(np.arange(side_n), sub, np.arange(len(sub)))
    lower = np.minimum(np.floor(position).astype(np.int64), len(sub) - 2)
    t = position - lower
    hat = np.zeros((side_n, len(sub)))
    hat[np.arange(side_n), lower] = 1.0 - t
    hat[np.arange(side_n), lower + 1] += t
    full = np.einsum("ia,abc->ibc", hat, w_lattice)
    full = np.einsum("jb,ibc->ijc", hat, full)
    full = np.einsum("kc,ijc->ijk", hat, full)
    w = full.reshape(-1)[flat]
    del full
    ask = np.abs(w - 0.5) < FAR_AMBIGUOUS
    if ask.any():
        ijk = np.stack(np.unravel_index(flat[ask], mask.shape), axis=1).astype(np.float64)
        w[ask] = winding(origin + h * ijk)
    return w > 0.5, w


def _membrane(magnitude: np.ndarray, inside: np.ndarray, w: np.ndarray, h: float) -> np.ndarray:
    """Distances to the fill surface w = 1/2 where the sign flips with no mesh in between."""
    fixed = np.full(magnitude.shape, np.inf)
    found = False
    for axis in range(3):
        a = [slice(None)] * 3
        b = [slice(None)] * 3
        a[axis] = slice(0, -1)
        b[axis] = slice(1, None)
        a, b = tuple(a), tuple(b)
        flip = (inside[a] != inside[b]) & (magnitude[a] + magnitude[b] > 1.2 * h)
        if not flip.any():
            continue
        found = True
        wa, wb = w[a][flip], w[b][flip]
        t = np.clip((wa - 0.5) / np.where(wa != wb, wa - wb, 1.0), 0.02, 0.98)
        ia = tuple(np.nonzero(flip))
        ib = list(ia)
        ib[axis] = ib[axis] + 1
        ib = tuple(ib)
        fixed[ia] = np.minimum(fixed[ia], t * h)
        fixed[ib] = np.minimum(fixed[ib], (1.0 - t) * h)
    if not found:
        return magnitude
    seeds = np.isfinite(fixed)
    edt, nearest = scipy.ndimage.distance_transform_edt(~seeds, sampling=h, return_indices=True)
    return np.minimum(magnitude, fixed[tuple(nearest)] + edt)


def vertex_normals(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(n, 3) area-weighted unit vertex normals."""
    n = np.cross(vertices[faces[:, 1]] - vertices[faces[:, 0]], vertices[faces[:, 2]] - vertices[faces[:, 0]])
    out = np.zeros_like(vertices)
    for c in range(3):
        np.add.at(out, faces[:, c], n)
    return out / np.maximum(np.linalg.norm(out, axis=1, keepdims=True), 1e-300)


def buried_vertices(vertices, faces, candidates: np.ndarray, depth: float, winding: WindingNumbers) -> np.ndarray:
    """(n,) bool: candidate vertices with solid on their outer side too (a wall inside another part)."""
    out = np.zeros(len(vertices), dtype=bool)
    idx = np.flatnonzero(candidates)
    if len(idx):
        normals = vertex_normals(vertices, faces)[idx]
        out[idx] = winding(vertices[idx] + max(depth, winding.tolerance) * normals) > 0.5
    return out


def refined_blocks(coarse_field, surface_points: np.ndarray, error: np.ndarray, fine_cell: float, tolerance: float,
                   side_nodes: int) -> np.ndarray:
    """(nb, nb, nb) bool: fine blocks around surface points where the coarse field is off the surface
    by more than ``tolerance`` (unit-box length; ``error`` : (n,) |coarse| there, buried points
    given as 0), grown by one block so the fine field fades in where the coarse one is already
    right. Curvature, thin parts and detail finer than the coarse grid all show up this way, at
    the input's own vertices."""
    nb = -(-side_nodes // BLOCK)
    bad = surface_points[error > tolerance]
    mask = np.zeros((nb, nb, nb), dtype=bool)
    if len(bad):
        e = coarse_field.half_extent
        idx = np.floor((bad + e) / fine_cell + 1.0).astype(np.int64) // BLOCK
        idx = np.clip(idx, 0, nb - 1)
        mask[tuple(idx.T)] = True
        mask = scipy.ndimage.binary_dilation(mask, structure=np.ones((3, 3, 3), bool))
    return mask


def fine_node_values(vertices, faces, coarse_field, resolution: int, band_cells: float, allowed: np.ndarray,
                     winding: WindingNumbers, parts: np.ndarray):
    """Residual node values (fine distance minus coarse field) on the fine blocks.

    Returns (BandDistances of the fine grid, residual (n, B, B, B) float64, 0 beyond the band)."""
    e = coarse_field.half_extent
    h = 2.0 * e / resolution
    side_n = resolution + 3
    origin = np.full(3, -e - h)
    # only triangles near an allowed block can reach it
    centroid_block = np.floor((vertices[faces].mean(axis=1) + e) / h + 1.0).astype(np.int64) // BLOCK
    near = scipy.ndimage.binary_dilation(allowed, structure=np.ones((3, 3, 3), bool))
    centroid_block = np.clip(centroid_block, 0, allowed.shape[0] - 1)
    corners = vertices[faces]
    large = np.linalg.norm(corners.max(axis=1) - corners.min(axis=1), axis=1) > BLOCK * h
    keep = near[tuple(centroid_block.T)] | large  # a large triangle may reach blocks far from its centre
    kept = np.flatnonzero(keep)
    bd = band_distances(vertices, faces[kept], origin, h, (side_n,) * 3, band_cells * h, allowed)
    ijk, flat = bd.nodes()
    pts = origin + h * ijk
    coarse = coarse_field.fast_values(pts).astype(np.float64)
    d = bd.distance.reshape(-1)[flat].astype(np.float64)
    s = bd.side.reshape(-1)[flat]
    value = np.where(s < 0, -d, d)
    # the triangle's side and the coarse field disagree by more than the band's own detail: a
    # wall inside another part, or a flap in the open; winding numbers decide (Jacobson et al. 2013)
    # with several parts a wall may lie inside another part however near its surface: any
    # disagreement counts there (the coarse field is shallow near such walls, measured -1.6 cells
    # five cells under a plate's top beside a fin standing in it)
    margin = 0.0 if parts.max() > 0 else DOUBT_CELLS * h
    doubt = ((s > 0) & (coarse < -margin)) | ((s < 0) & (coarse > margin))
    # where two parts meet in a block, one part's wall may lie inside the other (a fin standing in
    # a plate): nodes next to the mesh there ask too
    part = parts[kept[np.maximum(bd.face.reshape(-1)[flat], 0)]]
    block = flat // BLOCK**3
    lo = np.full(len(bd.blocks), np.iinfo(np.int64).max)
    hi = np.full(len(bd.blocks), -1)
    np.minimum.at(lo, block, part)
    np.maximum.at(hi, block, part)
    doubt |= (lo[block] != hi[block]) & ((d < JUNCTION_CELLS * h) | ((s < 0) != (coarse < 0)))
    doubt = np.flatnonzero(doubt & (d >= winding.tolerance))
    if len(doubt):
        inside = winding(pts[doubt]) > 0.5
        # where the winding number sides with the coarse field the triangle is a hidden wall or a
        # flap, whose distance is not the solid's: the coarse field holds there
        far_from_zero = np.abs(coarse[doubt]) > DOUBT_CELLS * h
        value[doubt] = np.where(inside == (s[doubt] < 0), value[doubt],
                                np.where(far_from_zero, coarse[doubt], np.where(inside, -d[doubt], d[doubt])))
    rim = np.abs(s) < RIM_COSINE  # beyond an open rim: the coarse sign and its membrane hold
    value[rim] = np.sign(coarse[rim]) * np.minimum(d[rim], np.abs(coarse[rim]))
    residual = np.zeros(bd.distance.shape, dtype=np.float64)
    residual.reshape(-1)[flat] = value - coarse
    return bd, residual
