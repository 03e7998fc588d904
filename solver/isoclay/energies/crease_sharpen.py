"""Bounded sharpening of rounded creases on a grid of field values.

Backward curvature flow is ill-posed, so sharpening here has a fixed, finite target instead: the
crease the two flat sides would make if extended. Near a rounded crease each node takes the
supporting planes of the nearby *flat* part of the surface (tangent plane through the closest
point, phi(y) + n_y . (x - y)) and their maximum (convex crease: intersection of half-spaces)
or minimum (concave crease: union). Where the curvature is consistently high (the rounding) this
value is the sharp crease; on flat faces it equals phi; on a body whose curvature is low
everywhere (a large sphere) the planes are its own tangent planes and change it by only the
polygonal gap, O(cell^2 / radius). The result is blended in by `amount` in [0, 1] and the change
per node is bounded by the sharpening radius, so it cannot blow up.

The plane construction is the one behind feature-sensitive reconstruction from tangent planes
(Kobbelt, Botsch, Schwanecke & Seidel 2001, "Feature sensitive surface extraction from volume
data"), applied here to the field values rather than to a mesh.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.ndimage

from .curvature_flow import BAND_CELLS, NodeGrid, curvature_sum, derivatives, narrow_band, principal_curvatures

#: A node is "curved" (part of a rounding) when max |k| * radius > CURVED, "flat" (a plane
#: source) when max |k| * radius < FLAT. Between the two it is neither.
CURVED = 0.6
FLAT = 0.3
#: Nodes within ZONE_CELLS of the surface are moved; planes come from flat nodes within SOURCE_CELLS.
ZONE_CELLS = 3.5
SOURCE_CELLS = 1.5


@dataclass(frozen=True)
class SharpenReport:
    """curved : nodes in roundings; changed : nodes whose value moved; max_change : largest |change| (unit box)."""

    curved: int
    changed: int
    max_change: float


def _ball(radius_cells: float, strides, sparse_beyond: float = 2.0):
    """Flat offsets within a ball: all within sparse_beyond cells, every other node farther out
    (flat sides are planes: half the samples carry the same planes at an eighth of the cost)."""
    r = int(np.floor(radius_cells))
    o = np.arange(-r, r + 1)
    d = np.stack(np.meshgrid(o, o, o, indexing="ij"), axis=-1).reshape(-1, 3)
    l2 = (d * d).sum(1)
    keep = (l2 <= radius_cells**2) & ((l2 <= sparse_beyond**2) | np.all(d % 2 == 0, axis=1))
    d = d[keep]
    return d @ np.asarray(strides), d.astype(np.float64)


def sharpen_grid(grid: NodeGrid, amount: float, radius: float, should_stop=None, denoise_cells: float = 0.0) -> SharpenReport:
    """Move node values toward the sharp crease of their flat neighbours, in place.

    amount : 0..1, fraction of the way to the sharp crease
    radius : unit-box length; roundings tighter than this are sharpened, surfaces curved more
        gently (radius of curvature above radius / FLAT) are left as they are
    denoise_cells : when > 0, normals and curvatures (which nodes are flat, which curved) come
        from a copy blurred by a Gaussian of this many cells, so leftover ripples of a scan do
        not pass for roundings; the planes' offsets still come from the field itself
    """
    h = grid.cell
    flat_values = grid.values.reshape(-1)
    band = narrow_band(grid, BAND_CELLS)
    if denoise_cells > 0:
        blurred = scipy.ndimage.gaussian_filter(grid.values, denoise_cells, mode="nearest").reshape(-1)
        g, hs = derivatives(blurred, band, h)
    else:
        g, hs = derivatives(flat_values, band, h)
    normals = g / np.maximum(np.linalg.norm(g, axis=1, keepdims=True), 1e-12)
    k1, k2 = principal_curvatures(g, hs)
    kmax = np.maximum(np.abs(k1), np.abs(k2)) * radius
    kappa = curvature_sum(g, hs, 2.0 / h)
    curved = kmax > CURVED
    flat = kmax < FLAT
    if not curved.any():
        return SharpenReport(0, 0, 0.0)
    reach = radius + 3.0 * h  # from the middle of a rounding out to where its sides are flat
    reach_cells = reach / h
    phi_band = flat_values[band.index]
    # which way the nearby rounding bends: curvature summed over curved nodes within reach
    bend = np.zeros(grid.values.size)
    bend[band.index[curved]] = kappa[curved]
    width = 2 * int(np.ceil(reach_cells)) + 1
    turn_all = scipy.ndimage.uniform_filter(bend.reshape(grid.values.shape), width, mode="constant").reshape(-1)
    near_curved = scipy.ndimage.uniform_filter(
        (bend != 0).astype(np.float32).reshape(grid.values.shape), width, mode="constant"
    ).reshape(-1)
    # nodes to move: close enough to the surface for the spline's zero set (support 2 cells, plus
    # the crease's own displacement) and with a rounding in reach
    zone = np.flatnonzero((np.abs(phi_band) < ZONE_CELLS * h) & (near_curved[band.index] > 0))
    # planes come from flat nodes next to the surface, where the normals are the surface's own
    source = flat & (np.abs(phi_band) < SOURCE_CELLS * h)
    # compact arrays of the plane sources, reachable by flat grid index
    src = np.flatnonzero(source)
    src_slot = np.full(grid.values.size, -1, dtype=np.int64)
    src_slot[band.index[src]] = np.arange(len(src))
    src_normals = normals[src]
    src_phi = phi_band[src]
    offsets, vectors = _ball(reach_cells, band.strides)
    p = band.index[zone]
    n_x = normals[zone]
    turn = turn_all[p]
    upper = np.full(len(zone), -np.inf)  # max over flat planes (convex)
    lower = np.full(len(zone), np.inf)  # min over flat planes (concave)
    ijk = np.stack(np.unravel_index(p, grid.values.shape), axis=1)
    margin = int(np.ceil(reach_cells)) + 1
    # nodes whose whole ball lies inside the grid need no bounds check (almost all of them)
    safe = np.all((ijk >= margin) & (ijk < grid.side - margin), axis=1)
    for off, vec in zip(offsets, vectors):
        target = p + off
        if not safe.all():
            moved = ijk + vec.astype(np.int64)
            inside = np.all((moved >= 0) & (moved < grid.side), axis=1)
            target = np.where(inside, target, p)  # p itself is never a source of its own ball offset
            q = np.where(inside, src_slot[target], -1)
        else:
            q = src_slot[target]
        hit = np.flatnonzero(q >= 0)
        if len(hit) == 0:
            continue
        j = q[hit]
        n_y = src_normals[j]
        keep = (n_y * n_x[hit]).sum(1) > 0.0
        hit, j, n_y = hit[keep], j[keep], n_y[keep]
        # tangent plane of y evaluated at x: phi(y) + n_y . (x - y), with x - y = -vec * h
        plane = src_phi[j] - h * (n_y @ vec)
        upper[hit] = np.maximum(upper[hit], plane)
        lower[hit] = np.minimum(lower[hit], plane)
    if should_stop is not None and should_stop():
        from ..errors import Cancelled

        raise Cancelled("cancelled during sharpening; nothing was written")
    phi = flat_values[p]
    target = np.where(turn > 0, upper, lower)
    found = np.isfinite(target)
    # a convex crease only moves outward (target below phi), a concave one only inward
    change = np.where(turn > 0, np.minimum(target - phi, 0.0), np.maximum(target - phi, 0.0))
    change = np.where(found, np.clip(change, -radius, radius), 0.0) * amount
    flat_values[p] = phi + change
    return SharpenReport(int(curved.sum()), int((np.abs(change) > 1e-9).sum()), float(np.abs(change).max(initial=0.0)))
