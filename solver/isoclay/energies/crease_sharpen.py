"""Bounded sharpening of rounded creases and corners on a grid of field values.

Backward curvature flow is ill-posed, so sharpening has a fixed, finite target instead: where
the sides next to a rounding would meet if extended (Kobbelt, Botsch, Schwanecke & Seidel 2001,
"Feature sensitive surface extraction from volume data": the sides' tangent planes,
intersected). Two sides for a crease, three for a corner.

1. Surface samples: the marching-cubes vertices of the grid, with principal curvatures read at
   several scales (the grid blurred by Gaussians of 1, 2, 4, 8 cells). A reading at blur sigma
   is trusted where sigma is well below the radius it reports; the largest trusted reading is the
   sample's radius of curvature. Noise shows only at the small scales, a fillet of radius r
   reads about r at every scale below r.
2. Roundness to undo R: given by the artist, or detected as the typical radius of the samples
   that are curved in one direction only (cylinder-like: fillets), when the surface also has
   flat sides. A sphere or a torus has no flat side and nothing is detected.
3. Sides: samples curved more gently than a rounding (radius above FILLET_MAX * R), split into
   patches where neighbouring normals turn sharply. Each patch offers its border, fitted over a
   half-disc of the side: point, normal and curvature across the border, so a gently curved side
   is extended with its own curvature and a flat one as its plane.
4. Roundings: all other samples. Each finds the sides it rounds into by the rolling ball: the
   circle from the sample, with its normal, tangent to a side's plane must be a rounding's (no
   larger than FILLET_MAX * R) and touch that side at its border; only sides bordering the
   sample's own rounding region count. It is a crease or corner when its normal lies between two
   or three of them that do not face opposite ways (a horn, a slab's round front are left alone).
5. Grid nodes belong to their nearest surface sample; those of a crease or corner take the
   maximum (convex) or minimum (concave) of its sides' extensions and of every facing side
   nearby (so a side missed as a partner still bounds the change: no spikes), one-sided (convex
   roundings only grow, concave ones only shrink), capped by how far the sides meet beyond the
   rolling ball (0.41 r at a 90-degree crease, 0.73 r at a cube corner), blended by the gate and
   by `amount`, and the change is lightly blurred so the spline through the nodes does not ring.
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
#: Flat: curvature * R below this (radius of curvature above 5 R). Detection needs flat sides; a
#: side's extension is straight across its border below this curvature.
FLAT = 0.2
#: Rounding: radius of curvature up to FILLET_MAX * R; anything gentler is a side (flat or
#: gently curved, extended with its own curvature).
FILLET_MAX = 1.5
#: The curvature across a side's border is fitted over its half-disc with this ridge (in R) on
#: the spread of the samples across, so a strip a few cells wide reads as flat, not as noise.
CURVATURE_RIDGE_R = 0.05
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
#: a shape count; smaller ones are roundings anyway, their radius below FILLET_MAX * R). Blurred
#: readings run high where a fillet meets its flat sides: fitted cubes rounded by 5/10/20/36% read
#: 2.15/1.60/1.38/1.10 r at 0.75 and 1.27/1.18/1.24/1.09 r at the median, but at the median the
#: slumped demo anvil's top edges were left visibly rounder (its radius 0.6 of the 0.75 one).
RADIUS_QUANTILE = 0.75
#: Neighbouring side samples belong to one patch while their normals differ by less than this.
PATCH_DEGREES = 20.0
#: A patch smaller than this (in R^2) is a spot of noise, not a side; a crease smaller than this
#: is a few samples where a rounding runs into a horn, not a crease.
MIN_PATCH_AREA_R2 = 0.1
#: Border planes are averaged over side samples of the same patch within this many R (and at least 2 cells).
PLANE_DISC_R = 0.6
#: Sides a rounding runs into (_touching_sides): borders are looked for within SEARCH times the
#: largest rounding (+3 cells; a 90-degree fillet's middle lies 0.77 r from each side's border,
#: a 36%-rounded cube's corner sample 1.2 r from its third side's border); the circle from the
#: sample tangent to the border's plane must touch it within TOUCH of its radius (+TOUCH_CELLS
#: cells) of the border point, on that side. On fitted rounded cubes (5-36%) the touching points
#: of true partners lie within 0.1 r of their border; on the slumped demo anvil the borders of
#: other parts (a foot's front below a face's front) miss by 0.5-1.5 r.
SEARCH = 2.5
TOUCH = 0.5
TOUCH_CELLS = 2.0
#: Largest change, in the rounding's radius: CAP_SLACK times the rolling-ball gap to where its
#: sides meet (_sagitta: 0.41 r on a 90-degree crease, 0.73 r at a cube corner; the slack covers
#: fitted radius readings 20% low), never more than CAP. The change bends off from KNEE of it.
CAP = 1.0
CAP_SLACK = 1.25
KNEE = 0.75
#: Two sides make a crease only if their normals differ by less than this: the edge of a wedge
#: sharper than 60 degrees lies more than one radius (CAP) beyond its rounding's middle, out of
#: reach, and a rounding between nearly opposite sides is a slab's round front (the slumped demo
#: anvil's foot, between its sole and its sloping top at 143 degrees, once grew a ledge).
MAX_SIDE_ANGLE = 120.0
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
#: Most sides one rounding sample rounds into (three at a corner, a spare for a fourth side at
#: a pyramid's apex), and most further sides that bound its change (the nearest ones).
MAX_SIDES = 4
MAX_BOUNDS = 3


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
    if s.area[np.abs(s.k_big) * radius < FLAT].sum() < MIN_SIDE_AREA * total:
        return None
    return radius


def _side_patches(s: _Samples, side: np.ndarray, radius: float):
    """Label (n,) of each side sample's patch (-1 elsewhere, and in patches smaller than
    MIN_PATCH_AREA_R2 R^2) and the patch count."""
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


@dataclass(frozen=True)
class _Sides:
    """The sides' borders, each extended beyond the border as a cylinder of the side's own curvature
    across it (a plane where the side is flat).

    point : (b, 3) on the side at its border; normal : (b, 3) the side's normal there;
    curvature : (b,) across the border (positive convex, 0 = flat); axis : (b, 3) along the border;
    label : (b,) patch
    """

    point: np.ndarray
    normal: np.ndarray
    curvature: np.ndarray
    axis: np.ndarray
    label: np.ndarray

    def distance(self, points: np.ndarray, which: np.ndarray, planes_from: int | None = None) -> np.ndarray:
        """(m, K) signed distances of points (m, 3) to the extended sides which (m, K) (nan where -1);
        columns from planes_from on are taken as the border's tangent planes (no curvature)."""
        out = np.full(which.shape, np.nan)
        row, slot = np.nonzero(which >= 0)
        j = which[row, slot]
        r = points[row] - self.point[j]
        a = self.axis[j]
        r -= (r * a).sum(1, keepdims=True) * a
        nrm = self.normal[j]
        k = self.curvature[j]
        if planes_from is not None:
            k = np.where(slot >= planes_from, 0.0, k)
        # the cylinder of curvature k through the border point: (|N + k r| - 1) / k, written so
        # that it becomes the plane's r . N as k goes to 0
        along = (r * nrm).sum(1)
        rr = (r * r).sum(1)
        bent = np.sqrt(np.maximum(1.0 + 2.0 * k * along + k * k * rr, 0.0))
        out[row, slot] = (2.0 * along + k * rr) / (1.0 + bent)
        return out


def _border_sides(s: _Samples, label: np.ndarray, radius: float, cell: float) -> _Sides:
    """The sides at the borders of the patches, thinned to about one per R/6 per patch, each fitted
    over a half-disc of its side (PLANE_DISC_R): mean point and normal, and the rate at which the
    normal turns across the border (its curvature there; below FLAT / R it counts as flat, so a
    flat face's voxel ripple does not bend its extension)."""
    a, b = s.edges[:, 0], s.edges[:, 1]
    border = np.zeros(len(s.points), dtype=bool)
    cut = label[a] != label[b]
    border[a[cut & (label[a] >= 0)]] = True
    border[b[cut & (label[b] >= 0)]] = True
    idx = np.flatnonzero(border)
    if len(idx) == 0:
        z = np.zeros((0, 3))
        return _Sides(z, z, np.zeros(0), z, np.zeros(0, dtype=np.int64))
    spacing = max(radius / 6.0, cell)
    key = np.column_stack([np.floor(s.points[idx] / spacing).astype(np.int64), label[idx]])
    _, first = np.unique(key, axis=0, return_index=True)
    idx = idx[first]
    nb = len(idx)
    sides = np.flatnonzero(label >= 0)
    disc = max(PLANE_DISC_R * radius, 2.0 * cell)
    pairs = cKDTree(s.points[idx]).sparse_distance_matrix(cKDTree(s.points[sides]), disc, output_type="coo_matrix")
    row, col = pairs.row, sides[pairs.col]
    same = label[idx[row]] == label[col]
    row, col = row[same], col[same]
    w = s.area[col]
    weight = np.maximum(np.bincount(row, weights=w, minlength=nb), 1e-300)

    def mean(values):
        return np.bincount(row, weights=w * values, minlength=nb) / weight

    centre = np.stack([mean(s.points[col, k]) for k in range(3)], 1)
    m = np.stack([mean(s.normals[col, k]) for k in range(3)], 1)
    m /= np.maximum(np.linalg.norm(m, axis=1, keepdims=True), 1e-12)
    out = s.points[idx] - centre
    t = out - (out * m).sum(1, keepdims=True) * m  # across the border, outward
    t /= np.maximum(np.linalg.norm(t, axis=1, keepdims=True), 1e-12)
    rel = s.points[col] - centre[row]
    u = (rel * t[row]).sum(1)  # across
    tilt = (s.normals[col] * t[row]).sum(1)  # the normal's lean across: turns at the curvature's rate
    height = (rel * m[row]).sum(1)
    mu, mt = mean(u), mean(tilt)
    var = mean((u - mu[row]) ** 2)
    beta = mean((u - mu[row]) * (tilt - mt[row])) / (var + (CURVATURE_RIDGE_R * radius) ** 2)
    beta = np.sign(beta) * np.maximum(np.abs(beta) - FLAT / radius, 0.0)
    # a side whose own curvature readings (multi-scale, noise-free) say flat is flat: its rim's
    # first turn toward the rounding must not bend the extension outward
    beta[mean(np.abs(s.k_big[col])) * radius < FLAT] = 0.0
    alpha = mt - beta * mu
    c0 = mean(height + alpha[row] * u + 0.5 * beta[row] * u * u)
    ub = (out * t).sum(1)
    point = centre + ub[:, None] * t + (c0 - alpha * ub - 0.5 * beta * ub * ub)[:, None] * m
    normal = m + (alpha + beta * ub)[:, None] * t
    normal /= np.linalg.norm(normal, axis=1, keepdims=True)
    curvature = beta
    axis = np.cross(m, t)
    axis /= np.maximum(np.linalg.norm(axis, axis=1, keepdims=True), 1e-12)
    return _Sides(point, normal, curvature, axis, label[idx])


def _touching_sides(points, normals, largest, convex, found: _Sides, side_tree, side_label, cell):
    """For each rounding sample, the sides it rounds into, best first, and the sides that bound
    its change: (m, MAX_SIDES) and (m, MAX_BOUNDS) border indices into `found`, -1 padded.

    A rounding between sides is swept by a ball tangent to each of them (the rolling-ball blend;
    Rossignac & Requicha 1984, "Constant-radius blending in solid modeling"). Seen from a sample x
    with normal n on a convex rounding (s = +1; concave s = -1), the circle through x with normal n
    tangent to a side's plane (p, m) has the radius r = -s (x - p) . m / (1 - n . m) and touches
    the plane at x - s r (n - m). The side is one the rounding runs into when that radius is a
    rounding's (at most `largest`, and x not beyond the plane) and the touching point lies at that
    side's border. A plane of the same orientation further away (a foot's front below a face's
    front) or a gently curved side's far border is never taken, and a corner's three sides are
    found however far the corner lies from the patches' middles.

    Every facing side within `largest` of x also bounds the change: a convex rounding never grows
    through a side's extension that it lies within (nor a concave one shrinks through one it lies
    outside), so a side missed as a partner cannot let a wedge run out past it as a spike.
    """
    m = len(points)
    if len(found.label) == 0 or m == 0:
        return np.full((m, MAX_SIDES), -1, dtype=np.int64), np.full((m, MAX_BOUNDS), -1, dtype=np.int64)
    sign = np.where(convex, 1.0, -1.0)
    reach = SEARCH * largest + 3.0 * cell
    partner, bound = [], []  # (row, border index, patch, key)
    for patch in np.unique(found.label):
        members = np.flatnonzero(found.label == patch)
        tree = cKDTree(found.point[members])
        apart, j = tree.query(points, distance_upper_bound=reach)
        row = np.flatnonzero(np.isfinite(apart))
        if len(row) == 0:
            continue
        col = members[j[row]]
        cos, depth = _facing(points[row], normals[row], sign[row], found, col)
        facing = (cos > 0.05) & (depth > -0.5 * cell)
        near = facing & (apart[row] <= largest + 3.0 * cell)
        bound.append((row[near], col[near], apart[row][near]))
        # the border point nearest to where the circle touches, found in two passes
        for _ in range(2):
            radius = np.maximum(depth, 0.0) / np.maximum(1.0 - cos, 1e-3)
            at = points[row] - (sign[row] * radius)[:, None] * (normals[row] - found.normal[col])
            touch, j = tree.query(at)
            col = members[j]
            cos, depth = _facing(points[row], normals[row], sign[row], found, col)
        radius = np.maximum(depth, 0.0) / np.maximum(1.0 - cos, 1e-3)
        at = points[row] - (sign[row] * radius)[:, None] * (normals[row] - found.normal[col])
        touch = np.linalg.norm(at - found.point[col], axis=1)
        # next to the border depth and 1 - cos both vanish: half a cell of depth is slack, not radius
        ok = (cos > 0.05) & (depth > -0.5 * cell) & (depth <= (1.0 - cos) * (largest + cell) + 0.5 * cell)
        ok &= touch <= TOUCH * radius + TOUCH_CELLS * cell
        ok[ok] = side_label[side_tree.query(at[ok])[1]] == patch  # the circle touches this side, not another
        partner.append((row[ok], col[ok], touch[ok]))

    def table(parts, limit):
        if not parts:
            return np.full((m, limit), -1, dtype=np.int64)
        row, col, key = (np.concatenate(x) for x in zip(*parts))
        return _nearest_per_patch(m, row, col, found.label[col], key, limit)

    return table(partner, MAX_SIDES), table(bound, MAX_BOUNDS)


def _facing(points, normals, sign, found: _Sides, col):
    """(cos between sample and border normals, how far each sample lies on the material's side of the border's plane)."""
    m = found.normal[col]
    return (normals * m).sum(1), -sign * ((points - found.point[col]) * m).sum(1)


def _nearest_per_patch(m: int, row, col, lab, key, limit: int) -> np.ndarray:
    """(m, limit) for each row the col of smallest key per patch lab, those sorted by key; -1 padded."""
    out = np.full((m, limit), -1, dtype=np.int64)
    if len(row) == 0:
        return out
    order = np.lexsort((key, lab, row))
    row, col, lab, key = row[order], col[order], lab[order], key[order]
    first = np.ones(len(row), dtype=bool)
    first[1:] = (row[1:] != row[:-1]) | (lab[1:] != lab[:-1])
    row, col, key = row[first], col[first], key[first]
    order = np.lexsort((key, row))
    row, col = row[order], col[order]
    start = np.searchsorted(row, np.arange(m))
    rank = np.arange(len(row)) - start[row]
    keep = rank < limit
    out[row[keep], rank[keep]] = col[keep]
    return out


def _bordering_only(s: _Samples, rounding: np.ndarray, label: np.ndarray, idx: np.ndarray, sides: np.ndarray,
                    side_label: np.ndarray, patches: int, radius: float) -> np.ndarray:
    """sides (m, MAX_SIDES) of the rounding samples idx, keeping only patches that the sample's
    rounding region (connected rounding samples) borders, and none on a region smaller than
    MIN_PATCH_AREA_R2 R^2. A spot of noise in the middle of a face borders only that face, so it
    never reaches for the sides of the edge beyond it."""
    a, b = s.edges[:, 0], s.edges[:, 1]
    n = len(s.points)
    both = rounding[a] & rounding[b]
    graph = scipy.sparse.coo_matrix((np.ones(int(both.sum())), (a[both], b[both])), shape=(n, n))
    _, comp = scipy.sparse.csgraph.connected_components(graph, directed=False)
    count = comp.max() + 1
    touching = np.zeros((count, max(patches, 1)), dtype=bool)
    for u, v in ((a, b), (b, a)):
        hit = rounding[u] & (label[v] >= 0)
        touching[comp[u[hit]], label[v[hit]]] = True
    area = np.bincount(comp[rounding], weights=s.area[rounding], minlength=count)
    touching &= (area >= MIN_PATCH_AREA_R2 * radius**2)[:, None]
    valid = sides >= 0
    keep = valid & touching[comp[idx][:, None], side_label[np.maximum(sides, 0)]]
    out = np.full_like(sides, -1)
    rank = np.cumsum(keep, axis=1) - 1
    r, c = np.nonzero(keep)
    out[r, rank[r, c]] = sides[r, c]
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
        # a corner's three sides meet pairwise within MAX_SIDE_ANGLE: a top and an underside with
        # a front between them span half of all directions and would let the corner run out
        # sideways where the fourth side is missing (a face block's end where a horn grows out)
        limit = np.cos(np.radians(MAX_SIDE_ANGLE))
        apart3 = ((a[three] * b[three]).sum(1) > limit) & ((a[three] * c[three]).sum(1) > limit) & ((b[three] * c[three]).sum(1) > limit)
        good = (det > 0.05) & apart3
        coef = np.zeros((int(three.sum()), 3))
        coef[good] = np.linalg.solve(mat[good], n_x[three][good][:, :, None])[:, :, 0]
        hit = good & np.all(coef > -CONE_SLACK, axis=1)
        for u, v in ((a, c), (b, c)):
            hit |= cone2(n_x[three], u[three], v[three])
        ok[three] = hit
    return ok


def _soft_cap(x: np.ndarray, cap: np.ndarray) -> np.ndarray:
    """x for 0 <= x <= KNEE * cap, then bending smoothly (C1) toward cap; x >= 0."""
    knee = KNEE * cap
    rest = np.maximum(cap - knee, 1e-300)
    return np.where(x <= knee, x, knee + rest * np.tanh((x - knee) / rest))


def _sagitta(partner_normals: np.ndarray, count: np.ndarray) -> np.ndarray:
    """(m,) how far beyond a rolling ball of radius 1 its sides' planes meet: for the ball tangent
    to k = 2 or 3 planes with unit normals (the first k of partner_normals (m, 3, 3)), the point
    where they meet lies at |c| = sqrt(1^T G^-1 1) from its centre (G the normals' Gram matrix),
    so the gap is |c| - 1: 1 / cos(theta / 2) - 1 for a crease of angle theta (0.41 at 90
    degrees), sqrt(3) - 1 = 0.73 at a cube's corner. Capped at CAP."""
    m = len(count)
    k3 = count >= 3
    gram = np.einsum("mic,mjc->mij", partner_normals, partner_normals)
    gram[~k3, 2, :] = 0.0
    gram[~k3, :, 2] = 0.0
    gram[~k3, 2, 2] = 1.0
    ones = np.ones((m, 3))
    ones[~k3, 2] = 0.0
    sol = np.linalg.solve(gram + 1e-9 * np.eye(3), ones[:, :, None])[:, :, 0]
    reach = np.sqrt(np.maximum((ones * sol).sum(1), 1.0))
    return np.minimum(reach - 1.0, CAP)


def find_roundings(grid: NodeGrid, radius: float | None = None, should_stop=None):
    """Detect roundings and their sides; returns (Roundings, private plan for sharpen_grid or None)."""
    h = grid.cell
    s = _surface_samples(grid, should_stop)
    if s is None:
        return Roundings(None, 0, 0, 0, 0, 0), None
    radius = detect_radius(s, h) if radius is None else float(radius)
    if radius is None:
        return Roundings(None, len(s.points), 0, 0, 0, 0), None
    side = s.radius > FILLET_MAX * radius
    label, patches = _side_patches(s, side, radius)
    fillet = ~side
    found = _border_sides(s, label, radius, h)
    if len(found.label) == 0:
        return Roundings(radius, len(s.points), int(side.sum()), int(fillet.sum()), 0, patches), None
    idx = np.flatnonzero(fillet)
    local = np.clip(s.radius[idx], 2.0 * h, FILLET_MAX * radius)
    on_side = np.flatnonzero(label >= 0)
    sides, blockers = _touching_sides(s.points[idx], s.normals[idx], FILLET_MAX * radius, s.k_big[idx] > 0, found,
                                      cKDTree(s.points[on_side]), label[on_side], h)
    sides = _bordering_only(s, fillet, label, idx, sides, found.label, patches, radius)
    between = _between(s.normals[idx], sides, found.normal)
    gate = np.zeros(len(s.points))
    gate[idx[between]] = 1.0
    # average the gate over neighbouring rounding samples so it ramps where a crease begins or
    # ends, not where the rounding meets its sides (that would leave the sides' border half done)
    n = len(s.points)
    ea, eb = s.edges[:, 0], s.edges[:, 1]
    inner = fillet[ea] & fillet[eb]
    adj = scipy.sparse.coo_matrix((np.ones(2 * int(inner.sum())), (np.r_[ea[inner], eb[inner]], np.r_[eb[inner], ea[inner]])), shape=(n, n)).tocsr()
    adj = adj + scipy.sparse.identity(n, format="csr")
    deg = np.asarray(adj.sum(1)).ravel()
    for _ in range(GATE_SMOOTHING):
        gate = (adj @ gate) / deg
    # a ramp where creases begin or end, but a lone failed test inside a crease leaves no dent
    gate = _smoothstep((gate - 0.2) / 0.6)
    gate[~fillet] = 0.0
    # a crease too small to be one (a few samples where a rounding runs into a horn) is left alone
    on = gate > 1e-3
    linked = on[ea] & on[eb]
    _, piece = scipy.sparse.csgraph.connected_components(
        scipy.sparse.coo_matrix((np.ones(int(linked.sum())), (ea[linked], eb[linked])), shape=(n, n)), directed=False)
    size = np.bincount(piece[on], weights=s.area[on], minlength=piece.max() + 1)
    gate[on & (size[piece] < MIN_PATCH_AREA_R2 * radius**2)] = 0.0
    all_sides = np.full((n, MAX_SIDES + MAX_BOUNDS), -1, dtype=np.int64)
    same = (blockers[:, :, None] == sides[:, None, :]).any(2)  # a bound that is a partner already
    all_sides[idx] = np.concatenate([sides, np.where(same, -1, blockers)], axis=1)  # the partners first, then the bounds
    all_local = np.zeros(n)
    all_local[idx] = local
    # the change is bounded by how far the partners' planes meet beyond a rolling ball of the
    # rounding's own radius: planes that do not describe this rounding cannot carve or swell it
    valid = sides >= 0
    count = np.minimum(valid.sum(1), 3)
    pn = np.where(valid[:, :3, None], found.normal[np.maximum(sides[:, :3], 0)], 0.0)
    all_cap = np.zeros(n)
    all_cap[idx] = np.where(count >= 2, np.minimum(CAP_SLACK * _sagitta(pn, count), CAP) * local + 0.5 * h, 0.0)
    report = Roundings(radius, n, int(side.sum()), int(fillet.sum()), int(between.sum()), patches)
    plan = {"samples": s, "gate": gate, "sides": all_sides, "local": all_local, "cap": all_cap, "found": found}
    return report, plan


def _smoothstep(t):
    t = np.clip(t, 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def _sample_gaps(s: _Samples, active: np.ndarray, sides: np.ndarray, found: _Sides, cap: np.ndarray) -> np.ndarray:
    """(n,) how far each active sample lies from the sharp shape along its normal (outward on a
    convex rounding, where the ray leaves the intersection of its sides' half-spaces; inward on a
    concave one), through the sides' tangent planes, capped; 0 elsewhere. A cube corner's sample
    on the diagonal lies 0.73 r from the corner along it, though only 0.42 r below each plane."""
    gap = np.zeros(len(s.points))
    idx = np.flatnonzero(active)
    plane = found.distance(s.points[idx], sides[idx], 0)  # tangent planes
    cos = np.einsum("mkc,mc->mk", found.normal[np.maximum(sides[idx], 0)], s.normals[idx])
    sign = np.where(s.k_big[idx] > 0, 1.0, -1.0)[:, None]
    ahead = np.isfinite(plane) & (cos > 0.1)
    along = np.where(ahead, -sign * plane / np.where(ahead, cos, 1.0), np.inf)
    gap[idx] = np.minimum(np.maximum(along.min(1), 0.0), cap[idx])
    gap[idx[~np.isfinite(along.min(1))]] = 0.0
    return gap


def _nearest_sample_of_nodes(grid: NodeGrid, points: np.ndarray) -> np.ndarray:
    """(S^3,) for every node the sample nearest to it, up to half a cell: each sample marks its
    nearest node and a Euclidean distance transform (scipy.ndimage.distance_transform_edt) hands
    every node the mark nearest to it (ten times faster than a k-d tree over a wide band)."""
    h = grid.cell
    ijk = np.clip(np.rint((points - grid.axis()[0]) / h).astype(np.int64), 0, grid.side - 1)
    marks = np.full(grid.values.shape, -1, dtype=np.int64)
    marks[tuple(ijk.T)] = np.arange(len(points))
    index = scipy.ndimage.distance_transform_edt(marks < 0, return_distances=False, return_indices=True)
    return marks[tuple(index)].reshape(-1)


def _nodes_to_update(grid: NodeGrid, s: _Samples, active: np.ndarray, gap: np.ndarray, found: _Sides, sides: np.ndarray):
    """The nodes a sharpening changes, the active sample each belongs to, and the distance of
    each to that sample's sharp shape (the maximum of its sides' extensions when convex, the
    minimum when concave).

    A node near the surface belongs to its nearest surface sample; when that one is active it changes if it lies between
    the old and the sharp surface or within FADE_CELLS beyond either, so every node up to the new
    surface and FADE_CELLS past it is covered, also beside a corner where the samples' normals fan
    out. Nodes farther out keep their values: the step there lies FADE_CELLS from both surfaces,
    where an interpolating cubic spline's ringing has decayed by 0.27^FADE_CELLS (the
    prefilter's pole, sqrt(3) - 2; Unser 1999).
    Returns (flat node indices, sample indices, sharp-shape distances).
    """
    h = grid.cell
    idx = np.flatnonzero(active)
    flat = grid.values.reshape(-1)
    fade = FADE_CELLS * h
    convex_active = s.k_big[idx] > 0
    out_reach = float(gap[idx[convex_active]].max(initial=-fade)) + fade  # beyond convex roundings
    in_reach = float(gap[idx[~convex_active]].max(initial=-fade)) + fade  # into concave ones
    reach = max(out_reach, in_reach)
    band = np.flatnonzero(((flat > -fade) & (flat < out_reach)) | ((flat < fade) & (flat > -in_reach)))
    # a node whose nearest surface sample is a side (or an untouched rounding) keeps its value: the
    # sides' extensions never reach back over the sides themselves
    nearest = _nearest_sample_of_nodes(grid, s.points)[band]
    found_ = active[nearest]
    band, owner = band[found_], nearest[found_]
    found_ = np.linalg.norm(grid.positions(band) - s.points[owner], axis=1) < reach
    band, owner = band[found_], owner[found_]
    convex = s.k_big[owner] > 0
    outward = np.where(convex, flat[band], -flat[band])  # toward the sharp shape
    keep = outward > -fade
    band, owner, convex = band[keep], owner[keep], convex[keep]
    plane = found.distance(grid.positions(band), sides[owner], MAX_SIDES)
    upper = np.where(np.isfinite(plane), plane, -np.inf).max(1)  # intersection of the sides' half-spaces
    lower = np.where(np.isfinite(plane), plane, np.inf).min(1)  # union
    sharp = np.where(convex, upper, lower)
    keep = np.where(convex, sharp, -sharp) <= fade
    return band[keep], owner[keep], sharp[keep]


def sharpen_grid(grid: NodeGrid, amount: float, radius: float | None = None, should_stop=None) -> SharpenReport:
    """Move node values toward the sharp creases and corners the sides make, in place.

    amount : 0..1, fraction of the way from the rounded to the sharp shape
    radius : unit-box length, the roundness to undo (roundings up to FILLET_MAX times it are
        sharpened, gentler surfaces are sides); None = detected
    """
    roundings, plan = find_roundings(grid, radius, should_stop)
    if plan is None or roundings.creases == 0:
        return SharpenReport(roundings, 0, 0.0)
    h = grid.cell
    s, gate = plan["samples"], plan["gate"]
    active = gate > 1e-3
    cap_all = plan["cap"]
    flat = grid.values.reshape(-1)
    gap = _sample_gaps(s, active, plan["sides"], plan["found"], cap_all)
    near, nearest, sharp = _nodes_to_update(grid, s, active, gap, plan["found"], plan["sides"])
    phi = flat[near]
    convex = s.k_big[nearest] > 0
    cap = cap_all[nearest]
    grow = _soft_cap(np.maximum(phi - sharp, 0.0), cap)  # convex roundings only gain material
    shrink = _soft_cap(np.maximum(sharp - phi, 0.0), cap)  # concave ones only lose it
    change = np.where(convex, -grow, shrink) * gate[nearest] * amount
    delta = np.zeros(flat.size)
    delta[near] = change
    if SMOOTH_CELLS > 0:
        delta = scipy.ndimage.gaussian_filter(delta.reshape(grid.values.shape), SMOOTH_CELLS, mode="constant", truncate=2.0).reshape(-1)
    flat += delta
    return SharpenReport(roundings, int((np.abs(delta) > 1e-9).sum()), float(np.abs(delta).max(initial=0.0)))
