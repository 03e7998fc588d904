"""Bounded sharpening of rounded creases on a grid of field values.

Backward curvature flow is ill-posed, so sharpening here has a fixed, finite target instead: the
crease the flat sides would make if extended. Near a rounded crease each node takes the
supporting planes of the nearby *flat* part of the surface (tangent plane through the closest
point, phi(y) + n_y . (x - y)) and their maximum (convex crease: intersection of half-spaces)
or minimum (concave crease: union). Where the curvature is consistently high (the rounding) this
value is the sharp crease; on flat faces it equals phi; on a body whose curvature is low
everywhere (a large sphere) no node counts as a rounding and nothing moves. The result is blended in by
`amount` in [0, 1] and the change per node is bounded by the sharpening radius.

The plane construction is the one behind feature-sensitive reconstruction from tangent planes
(Kobbelt, Botsch, Schwanecke & Seidel 2001, "Feature sensitive surface extraction from volume
data"), applied here to the field values rather than to a mesh.

The field is read back through an interpolating cubic spline, which rings on any step or kink
between neighbouring nodes, and a fitted field of a sculpt carries voxel-scale ripples. So
every decision is a smooth weight, never a per-node switch: flat / curved, near / far, facing /
turned away, convex / concave, "a crease runs here" and "enough planes were seen" all ramp, the
maximum over planes is a soft maximum a fraction of a cell wide, the one-sided limit and the
bound are rounded, and the change fades out over the band edge. Planes only count for a node
whose own normal lies among theirs (a fully rounded slab front with only its top and bottom
faces in reach has no crease to restore), and normals and curvatures are read from a lightly
blurred copy of the field.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.ndimage

from .curvature_flow import BAND_CELLS, NodeGrid, curvature_sum, derivatives, narrow_band, principal_curvatures, taper

#: A node is "curved" (part of a rounding) when max |k| * radius > CURVED, "flat" (a plane
#: source) when max |k| * radius < FLAT. Between the two it is neither. Both ramp: the curved
#: weight rises from FLAT to CURVED, the flat weight falls over FLAT_RAMP (strict: the first
#: nodes of a rounding, blurred toward flat, would lend tilted planes that stand proud of the
#: face they extend and leave a groove beside the sharpened edge).
CURVED = 0.6
FLAT = 0.3
FLAT_RAMP = (0.195, 0.3)
#: Planes come from flat nodes within about SOURCE_CELLS of the surface (weight fading out over one more cell).
SOURCE_CELLS = 1.5
#: Normals and curvatures are read from a copy blurred by this many cells (voxel-scale ripples are not roundings).
DENOISE_CELLS = 1.0
#: Width, in cells, of the soft maximum / minimum over the planes: creases come out rounded at
#: this sub-cell scale instead of as a kink the spline would ring on.
SOFT_CELLS = 0.3
#: Source planes turned away from the node's own normal fade out as n_y . n_x drops from
#: FACING[1] to FACING[0]: a node in a rounding between faces at 90 degrees sees each face at 45
#: degrees (0.71), at a box corner 54.7 degrees (0.58); a face seen at right angles (a slab's
#: top seen from its fully rounded front) cannot make a crease with the node's own side.
FACING = (0.3, 0.5)
#: A node's normal must lie among the normals of the planes it takes (a rounding between the
#: sides it turns between): its offset from their mean normal, over their spread in that
#: direction, may reach BETWEEN[0] in full and fades to nothing at BETWEEN[1]. A slab's fully
#: rounded front seen from its top face's planes lies far outside them (no front face to meet).
BETWEEN = (1.0, 2.0)
#: Least spread assumed in that test (a node within about 11 degrees of a single side passes).
SPREAD_FLOOR = 0.2
#: The crease gate is read on the surface and spread to the nodes around by a Gaussian of this many cells.
GATE_BLUR = 1.5
#: In the soft maximum a plane counts with its weight to this power: a plane that is only just
#: in reach or only just facing cannot win by standing a cell or two proud of the others.
WEIGHT_POWER = 8.0
#: Amount of rounding nearby (Gaussian-weighted count of curved nodes, per radius in cells) at which
#: a node is fully in a sharpening zone.
ZONE_PRESENCE = 3.0
#: Total plane-source weight (per cell of reach) at which the sharp target is fully trusted.
SUPPORT_CELLS = 0.03
#: The change field is finally smoothed by a Gaussian of this many cells.
SMOOTH_CELLS = 0.45


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


def _smoothstep(t):
    """0 below 0, 1 above 1, 3 t^2 - 2 t^3 between (C1)."""
    t = np.clip(t, 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def sharpen_grid(grid: NodeGrid, amount: float, radius: float, should_stop=None, denoise_cells: float = DENOISE_CELLS) -> SharpenReport:
    """Move node values toward the sharp crease of their flat neighbours, in place.

    amount : 0..1, fraction of the way to the sharp crease
    radius : unit-box length; roundings tighter than this are sharpened, surfaces curved more
        gently (radius of curvature above radius / FLAT) are left as they are
    denoise_cells : when > 0, normals and curvatures (which nodes are flat, which curved) come
        from a copy blurred by a Gaussian of this many cells, so leftover ripples of a scan or of
        a voxel remesh do not pass for roundings; the planes' offsets still come from the field

    Every quantity that decides a node's change varies smoothly from node to node (see the
    module notes), so the new field has no steps or kinks at grid scale for the spline to ring on.
    """
    h = grid.cell
    shape = grid.values.shape
    flat_values = grid.values.reshape(-1)
    band = narrow_band(grid, BAND_CELLS + 2.0)
    if denoise_cells > 0:
        blurred = scipy.ndimage.gaussian_filter(grid.values, denoise_cells, mode="nearest").reshape(-1)
        g, hs = derivatives(blurred, band, h)
    else:
        g, hs = derivatives(flat_values, band, h)
    normals = g / np.maximum(np.linalg.norm(g, axis=1, keepdims=True), 1e-12)
    k1, k2 = principal_curvatures(g, hs)
    kmax = np.maximum(np.abs(k1), np.abs(k2)) * radius
    kappa = curvature_sum(g, hs, 2.0 / h)
    phi_band = flat_values[band.index]
    near_surface = 1.0 - _smoothstep((np.abs(phi_band) / h - SOURCE_CELLS) / 1.0)
    curved_w = _smoothstep((kmax - FLAT) / (CURVED - FLAT)) * near_surface  # 0 flat .. 1 rounding
    flat_w = (1.0 - _smoothstep((kmax - FLAT_RAMP[0]) / (FLAT_RAMP[1] - FLAT_RAMP[0]))) * near_surface
    if not (curved_w > 0.5).any():
        return SharpenReport(0, 0, 0.0)
    reach = radius + 3.0 * h  # from the middle of a rounding out to where its sides are flat
    reach_cells = reach / h
    # how much rounding is nearby, and which way it bends (Gaussian averages: no hard window edge)
    sigma = 0.5 * reach_cells
    cw = np.zeros(grid.values.size)
    cw[band.index] = curved_w
    bend = np.zeros(grid.values.size)
    bend[band.index] = curved_w * kappa
    near_curved = scipy.ndimage.gaussian_filter(cw.reshape(shape), sigma, mode="constant", truncate=2.5).reshape(-1)
    turn_all = scipy.ndimage.gaussian_filter(bend.reshape(shape), sigma, mode="constant", truncate=2.5).reshape(-1)
    # share of the neighbourhood that is rounding: a lone curved node (noise) barely counts
    ref = scipy.ndimage.gaussian_filter(np.pad(np.ones((1, 1, 1)), int(np.ceil(2.5 * sigma))), sigma, mode="constant")
    presence_all = near_curved / (ZONE_PRESENCE * float(ref.max()) * max(1.0, radius / h))
    zone = np.flatnonzero(presence_all[band.index] > 1e-3)
    p = band.index[zone]
    presence = _smoothstep(presence_all[p])
    # convex (1) or concave (0): mean curvature of the nearby rounding, in units of 1 / radius
    mean_bend = turn_all[p] / np.maximum(near_curved[p], 1e-12) * radius
    convex = 0.5 * (1.0 + np.tanh(3.0 * mean_bend))
    # plane sources: flat nodes next to the surface, with a weight
    src = np.flatnonzero(flat_w > 1e-3)
    src_slot = np.full(grid.values.size, -1, dtype=np.int64)
    src_slot[band.index[src]] = np.arange(len(src))
    src_normals = normals[src]
    src_phi = phi_band[src]
    src_w = flat_w[src]
    offsets, vectors = _ball(reach_cells, band.strides)
    dist_w = (1.0 - (vectors * vectors).sum(1) / (reach_cells + 0.5) ** 2) ** 2
    n_x = normals[zone]
    tau = SOFT_CELLS * h
    # running soft maximum (upper) and soft minimum (lower) of the planes: a softmax-weighted
    # mean, kept stable by rescaling to the largest exponent seen so far
    hi_m = np.full(len(zone), -np.inf)
    hi_s0 = np.zeros(len(zone))
    hi_s1 = np.zeros(len(zone))
    lo_m = np.full(len(zone), -np.inf)
    lo_s0 = np.zeros(len(zone))
    lo_s1 = np.zeros(len(zone))
    support = np.zeros(len(zone))
    normal_sum = np.zeros((len(zone), 3))
    moment = np.zeros((len(zone), 3, 3))
    ijk = np.stack(np.unravel_index(p, shape), axis=1)
    margin = int(np.ceil(reach_cells)) + 1
    safe = np.all((ijk >= margin) & (ijk < grid.side - margin), axis=1)
    for off, vec, wd in zip(offsets, vectors, dist_w):
        target = p + off
        if not safe.all():
            moved = ijk + vec.astype(np.int64)
            inside = np.all((moved >= 0) & (moved < grid.side), axis=1)
            target = np.where(inside, target, p)
            q = np.where(inside, src_slot[target], -1)
        else:
            q = src_slot[target]
        hit = np.flatnonzero(q >= 0)
        if len(hit) == 0:
            continue
        j = q[hit]
        n_y = src_normals[j]
        dot = (n_y * n_x[hit]).sum(1)
        w = src_w[j] * wd * _smoothstep((dot - FACING[0]) / (FACING[1] - FACING[0]))
        keep = w > 0
        hit, j, n_y, w = hit[keep], j[keep], n_y[keep], w[keep]
        # tangent plane of y evaluated at x: phi(y) + n_y . (x - y), with x - y = -vec * h
        plane = src_phi[j] - h * (n_y @ vec)
        support[hit] += w
        normal_sum[hit] += w[:, None] * n_y
        moment[hit] += w[:, None, None] * (n_y[:, :, None] * n_y[:, None, :])
        wk = w**WEIGHT_POWER
        for m, s0, s1, e in ((hi_m, hi_s0, hi_s1, plane / tau), (lo_m, lo_s0, lo_s1, -plane / tau)):
            m_old = m[hit]
            m_new = np.maximum(m_old, e)
            scale = np.exp(m_old - m_new)
            ew = wk * np.exp(e - m_new)
            s0[hit] = s0[hit] * scale + ew
            s1[hit] = s1[hit] * scale + ew * plane
            m[hit] = m_new
    if should_stop is not None and should_stop():
        from ..errors import Cancelled

        raise Cancelled("cancelled during sharpening; nothing was written")
    phi = flat_values[p]
    found = hi_s0 > 0
    upper = np.where(found, hi_s1 / np.maximum(hi_s0, 1e-300), phi)
    lower = np.where(found, lo_s1 / np.maximum(lo_s0, 1e-300), phi)
    # a convex crease only moves outward (target below phi), a concave one only inward; soft
    # one-sided limits so the change starts without a kink
    out = -_ramp(phi - upper, tau)
    inw = _ramp(lower - phi, tau)
    change = convex * out + (1.0 - convex) * inw
    # enough plane sources nearby to trust the target (rises smoothly as sources come in reach)
    confidence = _smoothstep(support / (SUPPORT_CELLS * max(1.0, reach_cells)))
    # is the node's normal among its planes' normals? offset from their mean, in the direction
    # it deviates, against their spread (standard deviation) in that direction
    inv = 1.0 / np.maximum(support, 1e-12)
    mean_n = normal_sum * inv[:, None]
    m_hat = mean_n / np.maximum(np.linalg.norm(mean_n, axis=1, keepdims=True), 1e-12)
    dev = n_x - (n_x * m_hat).sum(1, keepdims=True) * m_hat
    dev_len = np.linalg.norm(dev, axis=1)
    d_hat = dev / np.maximum(dev_len, 1e-12)[:, None]
    spread_d = np.sqrt(np.maximum(np.einsum("ni,nij,nj->n", d_hat, moment, d_hat) * inv, 0.0))
    ratio = dev_len / np.maximum(spread_d, SPREAD_FLOOR)
    two_sided = 1.0 - _smoothstep((ratio - BETWEEN[0]) / (BETWEEN[1] - BETWEEN[0]))
    # "a crease runs here" is a property of the surface nearby: read it where the surface is (nodes
    # next to the zero set, whose normals and plane balls are the surface's own) and spread it to
    # the nodes off the surface by a normalised Gaussian average
    on_surface = 1.0 - _smoothstep(np.abs(phi) / h - 0.5)
    gate = np.zeros(grid.values.size)
    mass = np.zeros(grid.values.size)
    gate[p] = two_sided * on_surface
    mass[p] = on_surface
    gate = scipy.ndimage.gaussian_filter(gate.reshape(shape), GATE_BLUR, truncate=2.5).reshape(-1)
    mass = scipy.ndimage.gaussian_filter(mass.reshape(shape), GATE_BLUR, truncate=2.5).reshape(-1)
    two_sided = gate[p] / np.maximum(mass[p], 1e-3)
    change = change * confidence * presence * two_sided
    # bounded by the sharpening radius, smoothly
    change = radius * np.tanh(change / radius)
    # fade out away from the old and the new surface so the band edge never shows
    dist = np.minimum(np.abs(phi), np.abs(phi + change))
    change = change * taper(dist, h) * amount
    delta = np.zeros(grid.values.size)
    delta[p] = change
    if SMOOTH_CELLS > 0:
        delta = scipy.ndimage.gaussian_filter(delta.reshape(shape), SMOOTH_CELLS, mode="constant", truncate=2.0).reshape(-1)
    flat_values += delta
    curved_count = int((curved_w > 0.5).sum())
    return SharpenReport(curved_count, int((np.abs(delta) > 1e-9).sum()), float(np.abs(delta).max(initial=0.0)))


def _ramp(x, eps):
    """max(x, 0) with its corner rounded over [0, eps] (C1, exactly 0 for x <= 0 and x for x >= eps):
    2 x^2 / eps - x^3 / eps^2 in between."""
    t = np.clip(x, 0.0, eps)
    return np.where(x >= eps, x, 2.0 * t * t / eps - t * t * t / (eps * eps))
