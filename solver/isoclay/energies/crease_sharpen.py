"""Bounded sharpening of rounded creases and corners on a grid of field values.

Backward curvature flow is ill-posed, so sharpening has a fixed, finite target instead: where
the sides next to a rounding would meet if extended (Kobbelt, Botsch, Schwanecke & Seidel 2001,
"Feature sensitive surface extraction from volume data": the tangent planes of the sides,
intersected). Two sides for a crease, three (or more) for a corner.

1. Surface samples: the marching-cubes vertices of the grid, with principal curvatures read at
   several scales (the grid blurred by Gaussians of 1, 2, 4, 8 cells). A reading at blur sigma
   is trusted where sigma is well below the radius it reports; the largest trusted reading is the
   sample's radius of curvature. Noise shows only at the small scales, a fillet of radius r
   reads about r at every scale below r.
2. Roundness to undo R: given by the artist, or detected as the typical radius of the samples
   that are curved in one direction only (cylinder-like: fillets), when the surface also has
   sides. A sphere or a torus has no side and nothing is detected.
3. Sides: samples curved less than SIDE / R (flat or gently curved), split into patches where
   neighbouring normals turn sharply. Each patch offers the tangent planes of its border,
   averaged over a small disc of the side (Kobbelt's extension of the side).
4. Roundings: samples with a radius below FILLET_MAX * R. Each looks for the borders of the
   sides within reach (1.5 of its own radius); it is a crease or corner when its normal lies
   between the normals of two or three of them (a horn or a slab's round front lies between
   sides that face the same or opposite ways and is left alone).
5. Grid nodes near a rounding take the maximum (convex) or minimum (concave) of those planes,
   one-sided (convex roundings only grow, concave ones only shrink), capped at CAP times the
   rounding's radius with a smooth knee, blended by the gate and by `amount`, and the change is
   lightly blurred so the spline through the nodes does not ring.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.ndimage
import scipy.sparse
from scipy.spatial import cKDTree

from .curvature_flow import NodeGrid, principal_curvatures, zero_level_mesh

#: Blur scales (grid cells) at which curvature is read.
SCALES_CELLS = (1.0, 2.0, 4.0, 8.0)
#: Blurs of this many cells or more are read on a grid of half the resolution.
COARSE_FROM = 4.0
#: A reading at blur sigma is trusted when sigma <= TRUST * the radius it reads (a Gaussian of
#: sigma rounds a crease to a radius of about 2.5 sigma; at a third of the radius the reading of
#: a 0.05 rounding on a 128 grid is within 6% of it, measured on RoundedBoxSDF).
TRUST = 0.35
#: Readings at consecutive scales agree when their ratio stays within STABLE (measured on
#: RoundedBoxSDF roundings 0.05-0.36 at 128 cells: a fillet's readings move by under 15% per
#: doubling of the blur while it is trusted; a sharp crease's or a voxel ripple's double).
STABLE = 1.3
#: Side: curvature * R below this (radius of curvature above 5 R: flat or gently curved).
SIDE = 0.2
#: Rounding: radius of curvature up to FILLET_MAX * R.
FILLET_MAX = 1.5
#: Cylinder-like (fillet) samples: the smaller principal curvature below this share of the larger.
CYLINDER = 0.35
#: Detection: radii considered lie between MIN_RADIUS_CELLS cells (sharper is already as sharp
#: as the grid holds) and MAX_RADIUS_REL of the object's shortest extent (a rounding must leave
#: flat sides: 0.4 of a cube's side leaves 20% flat). Side area must reach MIN_SIDE_AREA and
#: fillet area MIN_FILLET_AREA of the surface, else the shape has nothing to sharpen.
MIN_RADIUS_CELLS = 1.5
MAX_RADIUS_REL = 0.4
MIN_SIDE_AREA = 0.05
MIN_FILLET_AREA = 0.01
#: The detected R is this area-weighted quantile of the fillets' radii (the larger roundings of
#: a shape count; smaller ones are roundings anyway, their radius below FILLET_MAX * R).
RADIUS_QUANTILE = 0.75
#: Neighbouring side samples belong to one patch while their normals differ by less than this.
PATCH_DEGREES = 20.0
#: A patch smaller than this (in R^2) is a spot of noise, not a side.
MIN_PATCH_AREA_R2 = 0.1
#: Border planes are averaged over side samples of the same patch within this many R (and at least 2 cells).
PLANE_DISC_R = 0.6
#: Reach of a rounding sample toward the sides' borders, in its own radius (+2 cells): a 90-degree
#: fillet's middle lies 0.77 r from each side, a corner's centre 0.96 r from its three.
REACH = 1.5
#: Largest change, in the rounding's radius (a cube corner is 0.73 r inside the sharp corner).
CAP = 1.0
#: Two sides make a crease only if their normals differ by less than this (antipodal sides: a slab).
MAX_SIDE_ANGLE = 150.0
#: Cone test: the rounding's normal must be a combination of the sides' normals with weights
#: above -CONE_SLACK and leave a residual below CONE_RESIDUAL.
CONE_SLACK = 0.1
CONE_RESIDUAL = 0.25
#: The gate is averaged this many times over the sample mesh's neighbours (no hard seam).
GATE_SMOOTHING = 3
#: The change field is finally blurred by a Gaussian of this many cells (no spline ringing).
SMOOTH_CELLS = 0.5
#: Nodes this many cells beyond both the old and the sharp surface keep their values (the spline's
#: ringing from that step has decayed to 0.27^6 = 4e-4 of it there).
FADE_CELLS = 6.0
#: Most sides one rounding sample takes planes from.
MAX_SIDES = 6


@dataclass(frozen=True)
class Roundings:
    """What was found on the surface.

    radius : R, the roundness to undo (unit box), or None when nothing was detected
    samples, side, fillet, creases : counts of surface samples; creases = fillet samples whose
        normal lies between two or three sides (crease or corner)
    patches : side patches
    """

    radius: float | None
    samples: int
    side: int
    fillet: int
    creases: int
    patches: int


@dataclass(frozen=True)
class SharpenReport:
    """roundings : the detection; changed : nodes whose value moved; max_change : largest |change| (unit box)."""

    roundings: Roundings
    changed: int
    max_change: float


@dataclass(frozen=True)
class _Samples:
    points: np.ndarray  # (n, 3)
    normals: np.ndarray  # (n, 3) at the smallest scale
    area: np.ndarray  # (n,)
    edges: np.ndarray  # (e, 2) mesh edges
    radius: np.ndarray  # (n,) radius of curvature at the largest trusted scale
    k_big: np.ndarray  # (n,) signed principal curvature of larger magnitude there
    k_small: np.ndarray  # (n,) the other one


def _stencil_derivatives(values: np.ndarray, index: np.ndarray, cell: float):
    """Gradient (n, 3) and Hessian (n, 3, 3) of trilinearly interpolated node values at fractional
    node coordinates index (n, 3), by central differences one cell wide."""
    def at(offset):
        return scipy.ndimage.map_coordinates(values, (index + offset).T, order=1, mode="nearest")

    e = np.eye(3)
    c = at(np.zeros(3))
    g = np.empty((len(index), 3))
    h = np.empty((len(index), 3, 3))
    plus = [at(e[a]) for a in range(3)]
    minus = [at(-e[a]) for a in range(3)]
    for a in range(3):
        g[:, a] = (plus[a] - minus[a]) / (2 * cell)
        h[:, a, a] = (plus[a] - 2 * c + minus[a]) / cell**2
        for b in range(a + 1, 3):
            m = (at(e[a] + e[b]) - at(e[a] - e[b]) - at(-e[a] + e[b]) + at(-e[a] - e[b])) / (4 * cell**2)
            h[:, a, b] = h[:, b, a] = m
    return g, h


def _surface_samples(grid: NodeGrid, should_stop) -> _Samples | None:
    verts, faces = zero_level_mesh(grid)
    if len(faces) == 0:
        return None
    h = grid.cell
    index = (verts - grid.axis()[0]) / h
    fn = np.cross(verts[faces[:, 1]] - verts[faces[:, 0]], verts[faces[:, 2]] - verts[faces[:, 0]])
    area = np.zeros(len(verts))
    for k in range(3):
        np.add.at(area, faces[:, k], np.linalg.norm(fn, axis=1) / 6.0)
    edges = np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]])  # each inner edge twice, harmless
    radius = np.full(len(verts), np.inf)
    k_big = np.zeros(len(verts))
    k_small = np.zeros(len(verts))
    normals = None
    coarse = None
    for sigma in SCALES_CELLS:
        if should_stop is not None and should_stop():
            from ..errors import Cancelled

            raise Cancelled("cancelled during sharpening; nothing was written")
        if 4 * sigma > grid.resolution:
            break
        if sigma >= COARSE_FROM:  # wide blurs on a grid of half the resolution (8x less work, same reading)
            if coarse is None:
                coarse = scipy.ndimage.gaussian_filter(grid.values, 1.0, mode="nearest", truncate=3.0)[::2, ::2, ::2]
            blurred = scipy.ndimage.gaussian_filter(coarse, np.sqrt(sigma**2 - 1.0) / 2.0, mode="nearest", truncate=3.0)
            g, hs = _stencil_derivatives(blurred, index / 2.0, 2.0 * h)
        else:
            blurred = scipy.ndimage.gaussian_filter(grid.values, sigma, mode="nearest", truncate=3.0)
            g, hs = _stencil_derivatives(blurred, index, h)
        k1, k2 = principal_curvatures(g, hs)
        big = np.where(np.abs(k1) >= np.abs(k2), k1, k2)
        small = np.where(np.abs(k1) >= np.abs(k2), k2, k1)
        r = 1.0 / np.maximum(np.abs(big), 1e-9)
        if normals is None:
            normals = g / np.maximum(np.linalg.norm(g, axis=1, keepdims=True), 1e-12)
            radius, k_big, k_small = r, big, small
            stable = np.ones(len(verts), dtype=bool)
            continue
        # trusted while the blur stays well below the radius read and the reading agrees with the
        # finer one (a blur inflates the reading of a rounding it covers, noise changes with scale)
        trusted = stable & (sigma * h <= TRUST * r) & (r <= STABLE * radius) & (r >= radius / STABLE)
        radius = np.where(trusted, r, radius)
        k_big = np.where(trusted, big, k_big)
        k_small = np.where(trusted, small, k_small)
        stable = trusted
    return _Samples(verts, normals, area, edges, radius, k_big, k_small)


def flat_share(grid: NodeGrid, radius_of_curvature: float = 1.0, blur_cells: float = 4.0) -> float:
    """Share of the surface area (0..1) whose radius of curvature, read through a blur of
    blur_cells (noise gone, the sides' flatness left), exceeds radius_of_curvature (unit box:
    the object's longest side): the flat sides a hard-surface prop is made of. A sphere or a
    lumpy scan has next to none."""
    verts, faces = zero_level_mesh(grid)
    if len(faces) == 0:
        return 0.0
    h = grid.cell
    coarse = scipy.ndimage.gaussian_filter(grid.values, 1.0, mode="nearest", truncate=3.0)[::2, ::2, ::2]
    blurred = scipy.ndimage.gaussian_filter(coarse, np.sqrt(blur_cells**2 - 1.0) / 2.0, mode="nearest", truncate=3.0)
    g, hs = _stencil_derivatives(blurred, (verts - grid.axis()[0]) / h / 2.0, 2.0 * h)
    k1, k2 = principal_curvatures(g, hs)
    flat = np.maximum(np.abs(k1), np.abs(k2)) * radius_of_curvature < 1.0
    fn = np.linalg.norm(np.cross(verts[faces[:, 1]] - verts[faces[:, 0]], verts[faces[:, 2]] - verts[faces[:, 0]]), axis=1)
    area = np.zeros(len(verts))
    for k in range(3):
        np.add.at(area, faces[:, k], fn)
    return float(area[flat].sum() / max(area.sum(), 1e-300))


def detect_radius(s: _Samples, cell: float) -> float | None:
    """R from the cylinder-like samples' radii, or None when the shape has no rounding between sides."""
    extent = s.points.max(axis=0) - s.points.min(axis=0)
    lo, hi = MIN_RADIUS_CELLS * cell, MAX_RADIUS_REL * float(extent.min())
    cylinder = (np.abs(s.k_small) < CYLINDER * np.abs(s.k_big)) & (s.radius >= lo) & (s.radius <= hi)
    total = s.area.sum()
    if s.area[cylinder].sum() < MIN_FILLET_AREA * total:
        return None
    r, w = s.radius[cylinder], s.area[cylinder]
    order = np.argsort(r)
    cum = np.cumsum(w[order])
    radius = float(r[order][np.searchsorted(cum, RADIUS_QUANTILE * cum[-1])])
    if s.area[np.abs(s.k_big) * radius < SIDE].sum() < MIN_SIDE_AREA * total:
        return None
    return radius


def _side_patches(s: _Samples, side: np.ndarray, radius: float):
    """Label (n,) of each side sample's patch (-1 elsewhere) and the patch count."""
    a, b = s.edges[:, 0], s.edges[:, 1]
    keep = side[a] & side[b] & ((s.normals[a] * s.normals[b]).sum(1) > np.cos(np.radians(PATCH_DEGREES)))
    n = len(s.points)
    graph = scipy.sparse.coo_matrix((np.ones(int(keep.sum())), (a[keep], b[keep])), shape=(n, n))
    _, comp = scipy.sparse.csgraph.connected_components(graph, directed=False)
    comp = np.where(side, comp, -1)
    if not side.any():
        return comp, 0
    areas = np.bincount(comp[side], weights=s.area[side], minlength=comp.max() + 1)
    big = areas >= MIN_PATCH_AREA_R2 * radius**2
    label = np.where(side & big[np.maximum(comp, 0)], comp, -1)
    used, label_c = np.unique(label[label >= 0], return_inverse=True)
    out = np.full(n, -1)
    out[label >= 0] = label_c
    return out, len(used)


def _border_planes(s: _Samples, label: np.ndarray, radius: float, cell: float):
    """Planes (points (b, 3), normals (b, 3), labels (b,)) at the borders of the side patches,
    thinned to about one per R/6 per patch, each averaged over a disc of the side."""
    a, b = s.edges[:, 0], s.edges[:, 1]
    border = np.zeros(len(s.points), dtype=bool)
    cut = label[a] != label[b]
    border[a[cut & (label[a] >= 0)]] = True
    border[b[cut & (label[b] >= 0)]] = True
    idx = np.flatnonzero(border)
    if len(idx) == 0:
        return np.zeros((0, 3)), np.zeros((0, 3)), np.zeros(0, dtype=np.int64)
    spacing = max(radius / 6.0, cell)
    key = np.column_stack([np.floor(s.points[idx] / spacing).astype(np.int64), label[idx]])
    _, first = np.unique(key, axis=0, return_index=True)
    idx = idx[first]
    sides = np.flatnonzero(label >= 0)
    disc = max(PLANE_DISC_R * radius, 2.0 * cell)
    pairs = cKDTree(s.points[idx]).sparse_distance_matrix(cKDTree(s.points[sides]), disc, output_type="coo_matrix")
    row, col = pairs.row, sides[pairs.col]
    same = label[idx[row]] == label[col]
    row, col = row[same], col[same]
    w = s.area[col]
    count = np.bincount(row, weights=w, minlength=len(idx))[:, None]
    centre = np.stack([np.bincount(row, weights=w * s.points[col, k], minlength=len(idx)) for k in range(3)], 1) / np.maximum(count, 1e-300)
    normal = np.stack([np.bincount(row, weights=w * s.normals[col, k], minlength=len(idx)) for k in range(3)], 1)
    normal /= np.maximum(np.linalg.norm(normal, axis=1, keepdims=True), 1e-12)
    return centre, normal, label[idx]


def _sides_within_reach(points, reach, plane_points, plane_labels):
    """For each point, the nearest border plane of each patch within its reach, nearest first:
    (m, MAX_SIDES) plane indices, -1 padded."""
    out = np.full((len(points), MAX_SIDES), -1, dtype=np.int64)
    if len(plane_points) == 0 or len(points) == 0:
        return out
    tree = cKDTree(plane_points)
    hits = tree.query_ball_point(points, reach)
    lengths = np.fromiter((len(x) for x in hits), dtype=np.int64, count=len(hits))
    if lengths.sum() == 0:
        return out
    row = np.repeat(np.arange(len(points)), lengths)
    col = np.fromiter((j for x in hits for j in x), dtype=np.int64, count=int(lengths.sum()))
    dist = np.linalg.norm(points[row] - plane_points[col], axis=1)
    lab = plane_labels[col]
    order = np.lexsort((dist, lab, row))
    row, col, lab, dist = row[order], col[order], lab[order], dist[order]
    first = np.ones(len(row), dtype=bool)
    first[1:] = (row[1:] != row[:-1]) | (lab[1:] != lab[:-1])
    row, col, dist = row[first], col[first], dist[first]
    order = np.lexsort((dist, row))
    row, col = row[order], col[order]
    start = np.searchsorted(row, np.arange(len(points)))
    rank = np.arange(len(row)) - start[row]
    keep = rank < MAX_SIDES
    out[row[keep], rank[keep]] = col[keep]
    return out


def _between(n_x: np.ndarray, sides: np.ndarray, plane_normals: np.ndarray) -> np.ndarray:
    """(m,) True where the sample normal lies in the cone of two or three of its sides' normals
    (the two or three nearest that face it), which also must not face opposite ways."""
    m = len(n_x)
    valid = sides >= 0
    nrm = np.where(valid[..., None], plane_normals[np.maximum(sides, 0)], 0.0)  # (m, K, 3)
    facing = valid & ((nrm * n_x[:, None, :]).sum(-1) > 0.05)
    # the first three facing sides, nearest first
    rank = np.cumsum(facing, axis=1) - 1
    pick = np.full((m, 3), -1)
    for k in range(sides.shape[1]):
        sel = facing[:, k] & (rank[:, k] < 3)
        pick[sel, rank[sel, k]] = k
    count = (pick >= 0).sum(1)
    ok = np.zeros(m, dtype=bool)
    rows = np.arange(m)
    a = nrm[rows, np.maximum(pick[:, 0], 0)]
    b = nrm[rows, np.maximum(pick[:, 1], 0)]
    c = nrm[rows, np.maximum(pick[:, 2], 0)]

    def cone2(x, u, v):
        # least squares x ~ alpha u + beta v
        uu, vv, uv = (u * u).sum(1), (v * v).sum(1), (u * v).sum(1)
        xu, xv = (x * u).sum(1), (x * v).sum(1)
        det = np.maximum(uu * vv - uv * uv, 1e-12)
        alpha = (xu * vv - xv * uv) / det
        beta = (xv * uu - xu * uv) / det
        res = np.linalg.norm(x - alpha[:, None] * u - beta[:, None] * v, axis=1)
        apart = uv > np.cos(np.radians(MAX_SIDE_ANGLE))
        distinct = uv < np.cos(np.radians(PATCH_DEGREES))
        return (alpha > -CONE_SLACK) & (beta > -CONE_SLACK) & (res < CONE_RESIDUAL) & apart & distinct

    two = count >= 2
    ok[two] = cone2(n_x[two], a[two], b[two])
    three = (count >= 3) & ~ok
    if three.any():
        mat = np.stack([a[three], b[three], c[three]], axis=2)  # columns are the normals
        det = np.abs(np.linalg.det(mat))
        good = det > 0.05
        coef = np.zeros((int(three.sum()), 3))
        coef[good] = np.linalg.solve(mat[good], n_x[three][good][:, :, None])[:, :, 0]
        hit = good & np.all(coef > -CONE_SLACK, axis=1)
        for u, v in ((a, c), (b, c)):
            hit |= cone2(n_x[three], u[three], v[three])
        ok[three] = hit
    return ok


def _soft_cap(x: np.ndarray, cap: np.ndarray) -> np.ndarray:
    """x for 0 <= x <= cap / 2, then bending smoothly (C1) toward cap; x >= 0."""
    half = 0.5 * cap
    return np.where(x <= half, x, half + half * np.tanh((x - half) / np.maximum(half, 1e-300)))


def find_roundings(grid: NodeGrid, radius: float | None = None, should_stop=None):
    """Detect roundings and their sides; returns (Roundings, private plan for sharpen_grid or None)."""
    h = grid.cell
    s = _surface_samples(grid, should_stop)
    if s is None:
        return Roundings(None, 0, 0, 0, 0, 0), None
    radius = detect_radius(s, h) if radius is None else float(radius)
    if radius is None:
        return Roundings(None, len(s.points), 0, 0, 0, 0), None
    side = np.abs(s.k_big) * radius < SIDE
    label, patches = _side_patches(s, side, radius)
    fillet = (label < 0) & ~side & (s.radius <= FILLET_MAX * radius)
    plane_p, plane_n, plane_l = _border_planes(s, label, radius, h)
    if len(plane_p) == 0:
        return Roundings(radius, len(s.points), int(side.sum()), int(fillet.sum()), 0, patches), None
    idx = np.flatnonzero(fillet)
    local = np.clip(s.radius[idx], 2.0 * h, FILLET_MAX * radius)
    sides = _sides_within_reach(s.points[idx], REACH * local + 2.0 * h, plane_p, plane_l)
    between = _between(s.normals[idx], sides, plane_n)
    gate = np.zeros(len(s.points))
    gate[idx[between]] = 1.0
    # average the gate over mesh neighbours so its edge is a ramp, not a seam
    n = len(s.points)
    adj = scipy.sparse.coo_matrix((np.ones(2 * len(s.edges)), (np.r_[s.edges[:, 0], s.edges[:, 1]], np.r_[s.edges[:, 1], s.edges[:, 0]])), shape=(n, n)).tocsr()
    adj = adj + scipy.sparse.identity(n, format="csr")
    deg = np.asarray(adj.sum(1)).ravel()
    for _ in range(GATE_SMOOTHING):
        gate = (adj @ gate) / deg
    # a ramp where creases begin or end, but a lone failed test inside a crease leaves no dent
    gate = _smoothstep((gate - 0.2) / 0.6)
    gate[~fillet] = 0.0
    all_sides = np.full((n, MAX_SIDES), -1, dtype=np.int64)
    all_sides[idx] = sides
    all_local = np.zeros(n)
    all_local[idx] = local
    report = Roundings(radius, n, int(side.sum()), int(fillet.sum()), int(between.sum()), patches)
    plan = {"samples": s, "gate": gate, "sides": all_sides, "local": all_local, "plane_p": plane_p, "plane_n": plane_n}
    return report, plan


def _smoothstep(t):
    t = np.clip(t, 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def _sample_gaps(s: _Samples, active: np.ndarray, sides: np.ndarray, plane_p, plane_n, cap: np.ndarray) -> np.ndarray:
    """(n,) how far each active sample lies from the sharp shape along its normal (its planes'
    maximum, or minimum when concave), capped; 0 elsewhere."""
    gap = np.zeros(len(s.points))
    idx = np.flatnonzero(active)
    plane = _planes_at(s.points[idx], sides[idx], plane_p, plane_n)
    convex = s.k_big[idx] > 0
    upper = np.where(np.isfinite(plane), plane, -np.inf).max(1)
    lower = np.where(np.isfinite(plane), plane, np.inf).min(1)
    gap[idx] = np.minimum(np.where(convex, np.maximum(-upper, 0.0), np.maximum(lower, 0.0)), cap[idx])
    return gap


def _planes_at(points: np.ndarray, sides: np.ndarray, plane_p, plane_n) -> np.ndarray:
    """(m, K) signed distances of points to their sides' planes (nan where a slot is empty)."""
    valid = sides >= 0
    p = plane_p[np.maximum(sides, 0)]
    nrm = plane_n[np.maximum(sides, 0)]
    out = ((points[:, None, :] - p) * nrm).sum(-1)
    return np.where(valid, out, np.nan)


def _nodes_to_update(grid: NodeGrid, s: _Samples, active: np.ndarray, gap: np.ndarray):
    """The nodes a sharpening changes and, for each, the active sample it belongs to.

    Each active sample marches along its normal (inward for a concave rounding) from FADE_CELLS
    inside the old surface to FADE_CELLS beyond the sharp shape and claims the nodes it passes
    (the sample a node is closest to, up to ties); nodes next to claimed ones are claimed by a
    neighbour, so diverging rays leave no holes. Nodes farther out keep their values: the step
    there lies FADE_CELLS from both surfaces, where an interpolating cubic spline's ringing has
    decayed by 0.27^FADE_CELLS (the prefilter's pole, sqrt(3) - 2; Unser 1999).
    Returns (flat node indices, sample indices).
    """
    h = grid.cell
    idx = np.flatnonzero(active)
    x, n = s.points[idx], s.normals[idx]
    far = gap[idx] + FADE_CELLS * h
    direction = np.where(s.k_big[idx] > 0, 1.0, -1.0)[:, None] * n
    owner = np.zeros(grid.values.shape, dtype=np.int64)  # sample index + 1, 0 = none
    origin = grid.axis()[0]
    hi = grid.side - 1
    ts = np.arange(-FADE_CELLS * h, float(far.max()) + 0.5 * h, 0.7 * h)
    for t in ts[np.argsort(-np.abs(ts))]:  # nearest to the surface written last, so it wins
        sel = t <= far
        ijk = np.clip(np.rint((x[sel] + t * direction[sel] - origin) / h).astype(np.int64), 0, hi)
        owner[tuple(ijk.T)] = idx[sel] + 1
    grown = scipy.ndimage.grey_dilation(owner, size=(3, 3, 3))
    owner = np.where(owner > 0, owner, grown).reshape(-1)
    nodes = np.flatnonzero(owner)
    return nodes, owner[nodes] - 1


def sharpen_grid(grid: NodeGrid, amount: float, radius: float | None = None, should_stop=None) -> SharpenReport:
    """Move node values toward the sharp creases and corners the sides make, in place.

    amount : 0..1, fraction of the way from the rounded to the sharp shape
    radius : unit-box length, the roundness to undo (roundings up to FILLET_MAX times it are
        sharpened; surfaces curved more gently than 1 / (5 radius) are sides); None = detected
    """
    roundings, plan = find_roundings(grid, radius, should_stop)
    if plan is None or roundings.creases == 0:
        return SharpenReport(roundings, 0, 0.0)
    h = grid.cell
    s, gate = plan["samples"], plan["gate"]
    active = gate > 1e-3
    cap_all = CAP * plan["local"]
    flat = grid.values.reshape(-1)
    gap = _sample_gaps(s, active, plan["sides"], plan["plane_p"], plan["plane_n"], cap_all)
    near, nearest = _nodes_to_update(grid, s, active, gap)
    pos = grid.positions(near)
    phi = flat[near]
    plane = _planes_at(pos, plan["sides"][nearest], plan["plane_p"], plan["plane_n"])
    convex = s.k_big[nearest] > 0
    upper = np.where(np.isfinite(plane), plane, -np.inf).max(1)  # intersection of the sides' half-spaces
    lower = np.where(np.isfinite(plane), plane, np.inf).min(1)  # union
    cap = cap_all[nearest]
    grow = _soft_cap(np.maximum(phi - upper, 0.0), cap)  # convex roundings only gain material
    shrink = _soft_cap(np.maximum(lower - phi, 0.0), cap)  # concave ones only lose it
    change = np.where(convex, -grow, shrink) * gate[nearest] * amount
    delta = np.zeros(flat.size)
    delta[near] = change
    if SMOOTH_CELLS > 0:
        delta = scipy.ndimage.gaussian_filter(delta.reshape(grid.values.shape), SMOOTH_CELLS, mode="constant", truncate=2.0).reshape(-1)
    flat += delta
    return SharpenReport(roundings, int((np.abs(delta) > 1e-9).sum()), float(np.abs(delta).max(initial=0.0)))
