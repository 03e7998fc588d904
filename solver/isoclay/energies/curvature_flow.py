"""Level-set curvature flows on a grid of field values: plain and volume-preserving mean curvature
flow, and the flow toward a target normal field used for feature-aware smoothing.

The field is handled as node values on the SplineSDF grid (phi at node_positions()); the flow
updates only a narrow band of nodes around the zero level set (Adalsteinsson & Sethian 1995,
"A fast level set method for propagating interfaces") with a smooth cut-off at the band edge
(Peng, Merriman, Osher, Zhao & Kang 1999, "A PDE-based fast local level set method").

Level-set motion by curvature (Osher & Sethian 1988):  phi_t = |grad phi| (kappa - kappa_target)
where kappa = div(grad phi / |grad phi|) = k1 + k2 (positive on convex shapes; a sphere of
radius r has kappa = 2 / r and shrinks as r^2 = r0^2 - 4 t). With a target normal field N,
kappa_target = div N and the flow is the gradient flow of the normal mismatch
integral |n - N|^2 (Tasdizen, Whitaker, Burchard & Osher 2002, "Geometric surface smoothing
via anisotropic diffusion of normals"): the surface relaxes until its normals match N.
Volume preservation subtracts the area-weighted mean speed on the zero level set, then
removes the remaining drift with one constant offset of phi.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Explicit time step as a fraction of cell^2. Motion by curvature behaves like a 2D
#: Laplacian along the level sets: the explicit limit is about cell^2 / 4; 0.15 leaves margin
#: for level sets lying diagonally in the grid (common practice, no source).
TIME_STEP_FRACTION = 0.15
#: Narrow band: nodes with |phi| < BAND_CELLS * cell move; the speed tapers off from
#: TAPER_CELLS * cell to the band edge so the far field never sees a kink.
BAND_CELLS = 4.5
TAPER_CELLS = 2.5
#: Half-width of the smeared delta / Heaviside functions used for area and volume, in cells.
SMEAR_CELLS = 1.5
#: Re-distance the band once the surface has moved this many cells since the last time, at
#: this quantile of the nodes next to it: a few nodes racing at a crease (an open scan's rim
#: against the cap its field puts over the hole) no longer force it every other step (the
#: demo stone's smoothing re-distanced 39 times in 50 steps, 22 s).
REDISTANCE_CELLS = 1.0
REDISTANCE_QUANTILE = 0.99


@dataclass
class NodeGrid:
    """Signed distances at the nodes of a SplineSDF grid.

    values : (S, S, S) float64 with S = resolution + 3, phi at node_positions() along each axis
    half_extent : the grid spans [-half_extent, half_extent]^3 in unit-box coordinates
    """

    values: np.ndarray
    half_extent: float

    @property
    def side(self) -> int:
        return int(self.values.shape[0])

    @property
    def resolution(self) -> int:
        return self.side - 3

    @property
    def cell(self) -> float:
        return 2.0 * self.half_extent / self.resolution

    def axis(self) -> np.ndarray:
        """(S,) node coordinates along each axis (same as SplineSDF.node_positions())."""
        return -self.half_extent + self.cell * (np.arange(self.side) - 1.0)

    def positions(self, flat_index: np.ndarray) -> np.ndarray:
        """(n, 3) unit-box coordinates of nodes given by flat indices."""
        i, j, k = np.unravel_index(flat_index, self.values.shape)
        a = self.axis()
        return np.stack([a[i], a[j], a[k]], axis=1)

    def copy(self) -> "NodeGrid":
        return NodeGrid(self.values.copy(), self.half_extent)


def node_grid_of(field, resolution: int = 128, half_extent: float | None = None) -> NodeGrid:
    """Node values of any SDFField on a grid of `resolution` cells spanning [-half_extent, half_extent]^3.

    half_extent : unit-box length, default the spline grid's DEFAULT_HALF_EXTENT (0.65)
    A SplineSDF with the same resolution and extent gives its exact node values from its
    coefficients (B-spline at integer offsets: (c[k-1] + 4 c[k] + c[k+1]) / 6 per axis, mirror
    at the ends, the inverse of spline_from_node_values); another SplineSDF is read axis by axis
    (separable); a SparseSplineSDF through its separable coarse spline plus its fine blocks; any
    other field (or grid) is sampled at the nodes, value-only (geometry.values uses a field's
    fast_values when it has one). Smooth and sharpen choose their own working resolution and read
    fields only through here.
    """
    from ..field.spline import DEFAULT_HALF_EXTENT, SplineSDF

    e = DEFAULT_HALF_EXTENT if half_extent is None else float(half_extent)
    if isinstance(field, SplineSDF) and field.resolution == resolution and abs(field.half_extent - e) < 1e-12:
        c = field.coefficients.detach().double().cpu().numpy()
        for axis in range(3):
            c = _node_stencil(c, axis)
        return NodeGrid(c, field.half_extent)
    if isinstance(field, SplineSDF):
        return _spline_on_grid(field, resolution, e)
    from ..field.grids import grid_values
    from ..field.sparse import SparseSplineSDF
    from ..geometry import values

    if isinstance(field, SparseSplineSDF):  # separable coarse part, fine residual only near its blocks
        grid = NodeGrid(np.zeros((1, 1, 1)), e)
        grid.values = grid_values(field, -e + 2.0 * e / resolution * (np.arange(resolution + 3) - 1.0))
        return grid
    grid = NodeGrid(np.zeros((resolution + 3,) * 3), e)
    a = grid.axis()
    out = np.empty(grid.values.shape)
    yz = np.stack(np.meshgrid(a, a, indexing="ij"), axis=-1).reshape(-1, 2)
    slabs = max(1, 2_000_000 // len(yz))  # a few slabs per query bounds memory for large grids
    for i in range(0, grid.side, slabs):
        xs = a[i : i + slabs]
        pts = np.column_stack([np.repeat(xs, len(yz)), np.tile(yz, (len(xs), 1))])
        out[i : i + len(xs)] = values(field, pts).reshape(len(xs), grid.side, grid.side)
    grid.values = out
    return grid


def _spline_on_grid(field, resolution: int, half_extent: float) -> NodeGrid:
    """A SplineSDF's values at the nodes of another grid, axis by axis: the nodes form a tensor
    product, so the 4 x 4 x 4 B-spline sum factors into three sparse 1D passes (the same numbers
    as SplineSDF.forward; a 195^3 working grid from a 128 spline in 0.4 s against 3.8 s pointwise)."""
    import scipy.sparse
    import torch

    from ..field.spline import cubic_bspline_weights

    grid = NodeGrid(np.zeros((resolution + 3,) * 3), half_extent)
    a = grid.axis()
    e, cell, side = field.half_extent, field.cell, field.resolution + 3
    inside = np.clip(a, -e, e)
    u = (inside + e) / cell
    base = np.clip(np.floor(u), 0, field.resolution - 1)
    w = cubic_bspline_weights(torch.from_numpy(u - base)).numpy()  # (n, 4)
    rows = np.repeat(np.arange(len(a)), 4)
    cols = (base[:, None].astype(np.int64) + np.arange(4)[None, :]).reshape(-1)
    basis = scipy.sparse.csr_matrix((w.reshape(-1), (rows, cols)), shape=(len(a), side))
    c = field.coefficients.detach().double().cpu().numpy()
    for _ in range(3):  # each pass contracts the leading axis and moves it to the back
        n0 = c.shape[0]
        c = (basis @ c.reshape(n0, -1)).reshape((len(a),) + c.shape[1:])
        c = np.moveaxis(c, 0, -1)
    outside = a - inside
    o2 = outside * outside
    grid.values = c + np.sqrt(o2[:, None, None] + o2[None, :, None] + o2[None, None, :] + 1e-12) - 1e-6
    return grid


def unit_box_grid(field, resolution: int, margin_cells: float = 8.0) -> NodeGrid:
    """node_grid_of over the unit box [-0.5, 0.5]^3 plus margin_cells cells each side (the room
    the bands, stencils and blurs of a flow or a sharpening need), `resolution` cells across."""
    return node_grid_of(field, resolution, 0.5 / (1.0 - 2.0 * margin_cells / resolution))


def _node_stencil(c: np.ndarray, axis: int) -> np.ndarray:
    padded = np.concatenate(
        [np.take(c, [1], axis=axis), c, np.take(c, [c.shape[axis] - 2], axis=axis)], axis=axis
    )
    n = c.shape[axis]
    lo = np.take(padded, np.arange(0, n), axis=axis)
    mid = np.take(padded, np.arange(1, n + 1), axis=axis)
    hi = np.take(padded, np.arange(2, n + 2), axis=axis)
    return (lo + 4.0 * mid + hi) / 6.0


def spline_of(grid: NodeGrid):
    """The SplineSDF interpolating the grid's node values."""
    from ..field.spline import spline_from_node_values

    return spline_from_node_values(grid.values, grid.half_extent)


# ----------------------------------------------------------------------------- band and stencils


@dataclass(frozen=True)
class Band:
    """Flat indices of the nodes near the zero level set, away from the grid's outer layer.

    index : (n,) int64 into grid.values.ravel(); strides : flat offsets of +x, +y, +z
    """

    index: np.ndarray
    strides: tuple[int, int, int]


def narrow_band(grid: NodeGrid, width_cells: float) -> Band:
    """Nodes with |phi| < width_cells * cell, excluding the two outermost node layers, so that
    stencils reaching two nodes out never leave the grid."""
    v = grid.values
    inner = np.zeros(v.shape, dtype=bool)
    inner[2:-2, 2:-2, 2:-2] = True
    mask = (np.abs(v) < width_cells * grid.cell) & inner
    s = grid.side
    return Band(np.flatnonzero(mask), (s * s, s, 1))


def derivatives(flat: np.ndarray, band: Band, cell: float):
    """Central-difference gradient (n, 3) and Hessian (n, 3, 3) of flat node values at band nodes."""
    p = band.index
    st = band.strides
    h = cell
    centre = flat[p]
    g = np.empty((len(p), 3))
    hs = np.empty((len(p), 3, 3))
    for a in range(3):
        plus, minus = flat[p + st[a]], flat[p - st[a]]
        g[:, a] = (plus - minus) / (2.0 * h)
        hs[:, a, a] = (plus - 2.0 * centre + minus) / (h * h)
        for b in range(a + 1, 3):
            sa, sb = st[a], st[b]
            mixed = (flat[p + sa + sb] - flat[p + sa - sb] - flat[p - sa + sb] + flat[p - sa - sb]) / (4.0 * h * h)
            hs[:, a, b] = hs[:, b, a] = mixed
    return g, hs


def curvature_sum(g: np.ndarray, hs: np.ndarray, limit: float | None = None) -> np.ndarray:
    """kappa = k1 + k2 = div(grad phi / |grad phi|) = (|g|^2 tr H - g^T H g) / |g|^3 (Goldman 2005, sign
    so a sphere gives +2/r). Clamped to +-limit (a grid cannot carry more; guards medial-axis nodes)."""
    gg = np.maximum((g * g).sum(1), 1e-12)
    trace = hs[:, 0, 0] + hs[:, 1, 1] + hs[:, 2, 2]
    ghg = np.einsum("ni,nij,nj->n", g, hs, g)
    kappa = (gg * trace - ghg) / gg**1.5
    if limit is not None:
        np.clip(kappa, -limit, limit, out=kappa)
    return kappa


def principal_curvatures(g: np.ndarray, hs: np.ndarray):
    """(k1, k2), k1 >= k2, from kappa / 2 -+ sqrt((kappa/2)^2 - K), K = g^T adj(H) g / |g|^4 (Goldman 2005)."""
    from ..geometry.curvature import _adjugate

    gg = np.maximum((g * g).sum(1), 1e-12)
    mean = 0.5 * curvature_sum(g, hs)
    gauss = np.einsum("ni,nij,nj->n", g, _adjugate(hs), g) / (gg * gg)
    root = np.sqrt(np.maximum(mean * mean - gauss, 0.0))
    return mean + root, mean - root


def taper(phi: np.ndarray, cell: float) -> np.ndarray:
    """Cut-off 1 for |phi| <= TAPER_CELLS cells, smooth cubic down to 0 at BAND_CELLS (Peng et al. 1999)."""
    beta, gamma = TAPER_CELLS * cell, BAND_CELLS * cell
    a = np.abs(phi)
    c = (a - gamma) ** 2 * (2.0 * a + gamma - 3.0 * beta) / (gamma - beta) ** 3
    return np.where(a <= beta, 1.0, np.where(a >= gamma, 0.0, c))


def smeared_delta(phi: np.ndarray, cell: float) -> np.ndarray:
    eps = SMEAR_CELLS * cell
    return np.where(np.abs(phi) < eps, (1.0 + np.cos(np.pi * phi / eps)) / (2.0 * eps), 0.0)


def smeared_inside(phi: np.ndarray, cell: float) -> np.ndarray:
    """Smooth indicator of phi < 0 (1 inside, 0 outside, a cosine ramp across the smear width)."""
    eps = SMEAR_CELLS * cell
    t = np.clip(-phi / eps, -1.0, 1.0)
    return 0.5 * (1.0 + t + np.sin(np.pi * t) / np.pi)


def enclosed_volume(grid: NodeGrid) -> float:
    """Volume of {phi < 0} from the smeared Heaviside on the node grid (unit-box cubic units).
    Nodes beyond the smear width count 0 or 1 without evaluating the ramp (10x faster on a 195^3 grid)."""
    v = grid.values
    eps = SMEAR_CELLS * grid.cell
    near = v[np.abs(v) < eps]
    return float((np.count_nonzero(v <= -eps) + smeared_inside(near, grid.cell).sum()) * grid.cell**3)


def level_set_area(grid: NodeGrid, band: Band) -> float:
    """Area of {phi = 0}: sum of delta(phi) |grad phi| cell^3 over band nodes."""
    flat = grid.values.ravel()
    g = _gradient(flat, band, grid.cell)
    return float((smeared_delta(flat[band.index], grid.cell) * np.linalg.norm(g, axis=1)).sum() * grid.cell**3)


def _gradient(flat: np.ndarray, band: Band, cell: float) -> np.ndarray:
    """(n, 3) central-difference gradient at band nodes."""
    p, st = band.index, band.strides
    return np.stack([(flat[p + s] - flat[p - s]) / (2.0 * cell) for s in st], axis=1)


def restore_volume(grid: NodeGrid, target_volume: float, iterations: int = 3) -> float:
    """Shift phi by constants until the enclosed volume matches target_volume; returns the total shift.

    Raising phi by c moves the level set inward by c, so the volume drops by c * area.
    """
    total = 0.0
    band = narrow_band(grid, BAND_CELLS)
    for _ in range(iterations):
        area = level_set_area(grid, band)
        if area <= 0:
            break
        c = (enclosed_volume(grid) - target_volume) / area
        grid.values += c
        total += c
        if abs(c) < 1e-6 * grid.cell:
            break
    return total


def zero_level_mesh(grid: NodeGrid):
    """(vertices (k, 3), faces (m, 3)) of phi = 0 by marching cubes on the node grid (Lewiner 2003, scikit-image)."""
    from skimage.measure import marching_cubes

    h = grid.cell
    verts, faces, _, _ = marching_cubes(grid.values, 0.0, spacing=(h, h, h), allow_degenerate=False)
    return verts + grid.axis()[0], faces.astype(np.int64)


def redistance(grid: NodeGrid, width_cells: float = BAND_CELLS + 2.0, keep_cells: float = 1.0) -> int:
    """Reset phi to the signed distance from its zero level set on the band; returns nodes changed.

    Curvature motion keeps the zero level set but distorts the others; when the surface has
    moved a cell or more the band needs true distances again. Distances are to the marching
    cubes surface of the grid (libigl point_mesh_squared_distance); nodes within keep_cells of
    the surface keep their values so the interface does not pick up the facets' kinks
    (the idea of Russo & Smereka 2000, "A remark on computing distance functions").
    """
    import igl

    verts, faces = zero_level_mesh(grid)
    if len(faces) == 0:
        return 0
    flat = grid.values.reshape(-1)
    band = narrow_band(grid, width_cells)
    phi = flat[band.index]
    far = np.abs(phi) >= keep_cells * grid.cell
    idx = band.index[far]
    d2, _, _ = igl.point_mesh_squared_distance(grid.positions(idx), verts, faces)
    flat[idx] = np.sign(phi[far]) * np.sqrt(d2)
    return int(len(idx))


# ----------------------------------------------------------------------------- the flow


@dataclass(frozen=True)
class FlowReport:
    """What a flow did: steps taken, time step, simulated time, volume before/after, mean |speed| last step."""

    steps: int
    time_step: float
    time: float
    volume_before: float
    volume_after: float
    last_speed: float


def curvature_flow(
    grid: NodeGrid,
    duration: float,
    preserve_volume: bool = True,
    target_normals: np.ndarray | None = None,
    progress=None,
    should_stop=None,
    max_steps: int = 100_000,
) -> FlowReport:
    """Evolve grid.values in place by phi_t = |grad phi| (kappa - div N) for the given time.

    duration : flow time in unit-box length^2 (a sphere of radius r vanishes at r^2 / 4)
    preserve_volume : subtract the area-weighted mean speed each step and fix the drift at the end
    target_normals : (S^3, 3) target unit normals N on the flat grid (zeros away from the band),
        or None for plain mean curvature flow (div N = 0)
    progress(fraction) and should_stop() are plain callables (optional).
    """
    h = grid.cell
    dt_max = TIME_STEP_FRACTION * h * h
    steps = int(np.ceil(duration / dt_max)) if duration > 0 else 0
    steps = min(steps, max_steps)
    dt = duration / steps if steps else 0.0
    band = narrow_band(grid, BAND_CELLS)
    flat = grid.values.reshape(-1)  # a view: updates land in grid.values
    volume_before = enclosed_volume(grid)
    target_kappa = None
    if target_normals is not None:
        target_kappa = _divergence(target_normals, band, h)
    limit = 2.0 / h
    speed_mean = 0.0
    drift = np.zeros(len(band.index))
    for step in range(steps):
        if should_stop is not None and should_stop():
            from ..errors import Cancelled

            raise Cancelled("cancelled during curvature flow; nothing was written")
        phi = flat[band.index]
        g, hs = derivatives(flat, band, h)
        kappa = curvature_sum(g, hs, limit)
        speed = kappa if target_kappa is None else kappa - np.clip(target_kappa, -limit, limit)
        grad_norm = np.linalg.norm(g, axis=1)
        if preserve_volume:
            w = smeared_delta(phi, h) * grad_norm
            total = w.sum()
            if total > 0:
                speed = speed - (w * speed).sum() / total
        update = dt * taper(phi, h) * grad_norm * speed
        flat[band.index] = phi + update
        drift += update
        near = np.abs(drift[np.abs(phi) < 2.0 * h])
        if len(near) and np.quantile(near, REDISTANCE_QUANTILE) > REDISTANCE_CELLS * h and step < steps - 1:
            # the surface has moved: restore distances so the band and the taper follow it
            redistance(grid)
            band = narrow_band(grid, BAND_CELLS)
            drift = np.zeros(len(band.index))
            if target_normals is not None:
                target_kappa = _divergence(target_normals, band, h)
        speed_mean = float(np.abs(speed[np.abs(phi) < h]).mean()) if np.any(np.abs(phi) < h) else 0.0
        if progress is not None and (step % 5 == 0 or step == steps - 1):
            progress((step + 1) / steps)
    if preserve_volume and steps:
        restore_volume(grid, volume_before)
    return FlowReport(steps, dt, dt * steps, volume_before, enclosed_volume(grid), speed_mean)


def _divergence(vectors: np.ndarray, band: Band, cell: float) -> np.ndarray:
    """Central-difference divergence (n,) of a flat (S^3, 3) vector field at band nodes."""
    out = np.zeros(len(band.index))
    for a, s in enumerate(band.strides):
        out += (vectors[band.index + s, a] - vectors[band.index - s, a]) / (2.0 * cell)
    return out
