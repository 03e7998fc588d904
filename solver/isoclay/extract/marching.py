"""Level-set meshing: marching cubes (Lewiner et al. 2003, scikit-image) on a grid evaluated only near the surface.

The grid is refined coarse to fine. Coarse lattices split a cell only when all its corners
lie within 1.2 cell diagonals of the surface (a distance field changes by at most one unit
per unit of length, so farther cells cannot hold surface; the 1.2 allows slightly
non-distance fields). The two finest lattices evaluate only nodes whose estimate from the
coarser level is close to zero, and a last pass evaluates the corners of every cell the
surface still passes through on estimates, until there is none, so marching cubes sees
exact values wherever it makes triangles. Nodes never evaluated inherit values
trilinearly from the coarser level, whose sign is right there. The finest grid's outer
layer is forced outside, so the result is always closed.
"""

from __future__ import annotations

import time

import numpy as np

from ..geometry.field_values import values as field_values
from ..mesh import measures
from ..mesh.types import TriangleMesh
from ..callbacks import check_stop, never_stop, no_progress

#: Coarsest lattice spacing in fine cells (a power of two).
COARSEST_STEP = 16
#: A corner within this many cell diagonals of the surface marks its cell for refinement.
BAND = 1.2
#: Lattices coarser than this step (in fine cells) are refined by the BAND rule.
CAREFUL_STEP = 4
#: Finer lattices evaluate a node when its estimate is within (a * step + b) fine cells of zero
#: (measured on the 256^3 anvil block: 5.2% of the nodes evaluated, mesh identical to dense).
NODE_BAND = (1.0, 0.2)
#: Evaluated values are kept at least this many fine cells away from zero.
OFF_ZERO = 1e-3
_CORNERS = np.array([[i, j, k] for i in (0, 1) for j in (0, 1) for k in (0, 1)])


def _upsample2(a: np.ndarray) -> np.ndarray:
    """Trilinear refinement of a node lattice by two: (n+1)^3 nodes -> (2n+1)^3 nodes."""
    out = np.empty(tuple(2 * s - 1 for s in a.shape), dtype=a.dtype)
    out[::2, ::2, ::2] = a
    out[1::2, ::2, ::2] = 0.5 * (a[:-1] + a[1:])
    out[:, 1::2, ::2] = 0.5 * (out[:, :-2:2, ::2] + out[:, 2::2, ::2])
    out[:, :, 1::2] = 0.5 * (out[:, :, :-2:2] + out[:, :, 2::2])
    return out


def _cells_near_surface(lattice: np.ndarray, diagonal: float) -> np.ndarray:
    """(nx, ny, nz) bool: cells with a sign change or all corners within BAND diagonals of zero."""
    corners = [lattice[i : i + lattice.shape[0] - 1, j : j + lattice.shape[1] - 1, k : k + lattice.shape[2] - 1]
               for i in (0, 1) for j in (0, 1) for k in (0, 1)]
    lo = np.minimum.reduce(corners)
    hi = np.maximum.reduce(corners)
    # surface inside the cell puts every corner within one diagonal of it
    farthest = np.maximum(np.abs(lo), np.abs(hi))
    return (lo <= 0) & (hi >= 0) | (farthest < BAND * diagonal)


def _nodes_of_cells(cells: np.ndarray) -> np.ndarray:
    """Node mask (n+1)^3 of all corners of the marked cells (n)^3."""
    nodes = np.zeros(tuple(s + 1 for s in cells.shape), dtype=bool)
    for i in (0, 1):
        for j in (0, 1):
            for k in (0, 1):
                nodes[i : i + cells.shape[0], j : j + cells.shape[1], k : k + cells.shape[2]] |= cells
    return nodes


def grid_layout(lo, hi, resolution: int) -> tuple[np.ndarray, float, np.ndarray]:
    """The fine grid extract_mesh uses for the box [lo, hi]: (origin (3,), cell length, cells
    per axis (3,)). One cell of padding each side, rounded up to whole coarse blocks, centred
    on the box."""
    lo = np.asarray(lo, dtype=np.float64)
    hi = np.asarray(hi, dtype=np.float64)
    cell = float(np.max(hi - lo)) / resolution
    cells = np.ceil((hi - lo) / cell + 2).astype(int)
    cells = ((cells + COARSEST_STEP - 1) // COARSEST_STEP) * COARSEST_STEP
    return (lo + hi) / 2 - cells * cell / 2, cell, cells


def dense_grid_values(field, lo, cell: float, shape) -> np.ndarray:
    """Field values at every node of a grid (reference for benchmarks): (nx, ny, nz) float32."""
    axes = [lo[d] + cell * np.arange(shape[d]) for d in range(3)]
    pts = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    return field_values(field, pts).reshape(shape)


def _unresolved_cells(values: np.ndarray, exact: np.ndarray) -> np.ndarray:
    """Flat node indices of the lower corners of cells whose corners change sign but were not all evaluated.

    Counts per cell by separable box sums over the 2x2x2 corners: the low nibble counts
    positive corners, the high nibble corners holding only an estimate.
    """
    code = (values > 0).view(np.uint8) + (~exact).view(np.uint8) * np.uint8(16)
    code = code[1:] + code[:-1]
    code = code[:, 1:] + code[:, :-1]
    code = code[:, :, 1:] + code[:, :, :-1]
    positive = code & np.uint8(15)
    cells = np.nonzero((positive > 0) & (positive < 8) & (code >= 16))
    return np.ravel_multi_index(cells, values.shape)


def _unresolved_cells_touching(nodes: np.ndarray, values: np.ndarray, exact: np.ndarray, corners: np.ndarray) -> np.ndarray:
    """_unresolved_cells restricted to the cells with a corner among these flat node indices."""
    ijk = np.stack(np.unravel_index(nodes, values.shape), axis=1)[:, None, :] - _CORNERS[None]
    ijk = ijk.reshape(-1, 3)
    ijk = ijk[((ijk >= 0) & (ijk < np.array(values.shape) - 1)).all(axis=1)]
    cells = np.unique(np.ravel_multi_index(ijk.T, values.shape))
    at = cells[:, None] + corners[None, :]
    positive = (values.reshape(-1)[at] > 0).sum(axis=1)
    settled = exact.reshape(-1)[at].all(axis=1)
    return cells[(positive > 0) & (positive < 8) & ~settled]


def _evaluate_at(flat: np.ndarray, lattice: np.ndarray, exact: np.ndarray, evaluate) -> None:
    """Evaluate the lattice nodes with these flat indices in place and mark them exact."""
    if len(flat):
        lattice.reshape(-1)[flat] = evaluate(np.stack(np.unravel_index(flat, lattice.shape), axis=1))
        exact.reshape(-1)[flat] = True


def narrow_band_values(field, lo, cell: float, cells_per_axis, progress=no_progress, should_stop=never_stop):
    """Values on a fine node lattice, evaluated only near the surface.

    cells_per_axis : (3,) multiples of COARSEST_STEP. Returns (values (nx+1, ny+1, nz+1)
    float32, evaluated (same shape, bool: True where the value is the field's own), number of
    field evaluations). Every cell whose corners change sign has all its corners evaluated.

    Three stages. Down to lattice step CAREFUL_STEP, cells are split when all their corners
    lie within BAND diagonals of the surface, which cannot miss surface of a distance field.
    Below that, nodes are evaluated where the estimate from the coarser level lies within
    NODE_BAND of zero. Last, every cell whose corners change sign but hold an estimate gets
    its corners evaluated, until none is left, so the marching cubes see exact values
    wherever the surface passes and follow it wherever it continues.
    """
    lo = np.asarray(lo, dtype=np.float64)
    step = COARSEST_STEP
    shape = tuple(int(c) // step + 1 for c in cells_per_axis)
    evaluations = 0

    def evaluate(nodes: np.ndarray) -> np.ndarray:
        nonlocal evaluations
        evaluations += len(nodes)
        v = field_values(field, lo + cell * step * nodes)
        # A value this close to zero would put several marching-cubes vertices on one spot
        # (zero-area triangles); a thousandth of a cell off zero keeps every triangle proper.
        tiny = np.float32(OFF_ZERO * cell)
        near = np.abs(v) < tiny
        v[near] = np.where(v[near] < 0, -tiny, tiny)
        return v

    lattice = evaluate(np.indices(shape).reshape(3, -1).T).reshape(shape)
    exact = np.ones(shape, dtype=bool)
    active = np.ones(tuple(s - 1 for s in shape), dtype=bool)
    levels = int(np.log2(step))
    for level in range(levels):
        check_stop(should_stop, "extract")
        careful = step > CAREFUL_STEP
        if careful:
            active &= _cells_near_surface(lattice, np.sqrt(3) * cell * step)
        step //= 2
        lattice = _upsample2(lattice)
        refined = np.zeros(lattice.shape, dtype=bool)
        refined[::2, ::2, ::2] = exact
        exact = refined
        if careful:
            active = np.repeat(np.repeat(np.repeat(active, 2, axis=0), 2, axis=1), 2, axis=2)
            todo = _nodes_of_cells(active) & ~exact
        else:
            todo = (np.abs(lattice) <= (NODE_BAND[0] * step + NODE_BAND[1]) * cell) & ~exact
        _evaluate_at(np.flatnonzero(todo), lattice, exact, evaluate)
        progress("extract", 0.8 * (level + 1) / levels, {"grid": int(max(lattice.shape)) - 1, "evaluated": evaluations})
    corners = np.ravel_multi_index(_CORNERS.T, lattice.shape)
    cells = _unresolved_cells(lattice, exact)
    while len(cells):  # follow the surface where it leaves the evaluated shell
        check_stop(should_stop, "extract")
        nodes = np.unique((cells[:, None] + corners[None, :]).reshape(-1))
        nodes = nodes[~exact.reshape(-1)[nodes]]
        _evaluate_at(nodes, lattice, exact, evaluate)
        cells = _unresolved_cells_touching(nodes, lattice, exact, corners)
    progress("extract", 0.9, {"grid": int(max(lattice.shape)) - 1, "evaluated": evaluations})
    return lattice, exact, evaluations


#: Cells per side of the chunks a large grid is meshed in (a multiple of COARSEST_STEP): a 256^3
#: chunk holds 17M nodes (about 100 MB of values and masks), so a 1024-cell extraction never
#: allocates the 4 GB a dense grid would need.
CHUNK_CELLS = 256


def extract_mesh(
    field,
    lo,
    hi,
    resolution: int = 256,
    progress=no_progress,
    should_stop=never_stop,
    stats: dict | None = None,
) -> TriangleMesh:
    """Watertight, outward-facing triangle mesh of the zero level set inside the box [lo, hi].

    lo, hi : (3,) corners of a box that contains the surface (unit-box coordinates)
    resolution : fine cells along the longest side of the box
    stats : optional dict receiving "evaluations", "dense_nodes", "seconds", "chunks"
    Grids larger than CHUNK_CELLS per side are meshed chunk by chunk; vertices on the planes
    between chunks are merged by the grid edge they lie on, so the result is one closed mesh.
    """
    t0 = time.perf_counter()
    origin, cell, cells = grid_layout(lo, hi, resolution)
    starts = [np.arange(0, int(c), CHUNK_CELLS) for c in cells]
    chunks = [(i, j, k) for i in starts[0] for j in starts[1] for k in starts[2]]
    verts_all, faces_all, keys_all = [], [], []
    evaluations, lowest, highest, count = 0, np.inf, -np.inf, 0
    for n, start in enumerate(chunks):
        start = np.array(start)
        size = np.minimum(cells - start, CHUNK_CELLS)
        fraction = lambda stage, f, info, n=n: progress(stage, (n + f) / len(chunks), info)  # noqa: E731
        v, f, evals, grid_lo, grid_hi = _mesh_chunk(field, origin, cell, cells, start, size, fraction, should_stop)
        evaluations += evals
        lowest, highest = min(lowest, grid_lo), max(highest, grid_hi)
        if len(f):
            keys_all.append(_edge_keys(v + start, cells))
            verts_all.append(v)
            faces_all.append(f + count)
            count += len(v)
            verts_all[-1] = v * cell + origin + start * cell
    if not (lowest < 0 < highest) or not faces_all:
        raise_empty(np.array([lowest, highest]))
    verts = np.concatenate(verts_all)
    faces = np.concatenate(faces_all)
    if len(chunks) > 1:
        keys = np.concatenate(keys_all)
        uniq, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
        verts, faces = verts[first], inverse[faces]
    faces = faces.astype(np.int64)
    if measures.signed_volume(verts, faces) < 0:
        faces = faces[:, ::-1]
    if stats is not None:
        stats.update(evaluations=evaluations, dense_nodes=int(np.prod(cells + 1)), seconds=time.perf_counter() - t0,
                     chunks=len(chunks))
    progress("extract", 1.0, {"faces": len(faces)})
    return TriangleMesh(np.ascontiguousarray(verts, dtype=np.float64), np.ascontiguousarray(faces))


def _mesh_chunk(field, origin, cell, cells, start, size, progress, should_stop):
    """Marching cubes on one chunk: (vertices in chunk cell units, faces, evaluations, min, max)."""
    from skimage.measure import marching_cubes

    grid, visit, evaluations = narrow_band_values(field, origin + start * cell, cell, size, progress, should_stop)
    # Close the surface at the box walls. Marching cubes visits only cells with a corner in
    # `visit` (scikit-image tests the cell's highest corner, measured): the evaluated nodes
    # (every cell the surface passes has all corners evaluated) and the two layers at each wall.
    for axis in range(3):
        for end, layers in ((0, [0, 1]), (-1, [-2, -1])):
            at_wall = start[axis] == 0 if end == 0 else start[axis] + size[axis] == cells[axis]
            if not at_wall:
                continue
            walls = [slice(None)] * 3
            walls[axis] = end
            grid[tuple(walls)] = np.maximum(grid[tuple(walls)], cell)
            walls[axis] = layers
            visit[tuple(walls)] = True
    low, high = float(grid.min()), float(grid.max())
    if not (low < 0 < high):
        return np.zeros((0, 3)), np.zeros((0, 3), np.int64), evaluations, low, high
    # no node value lies within OFF_ZERO cells of zero, so no triangle is degenerate and
    # scikit-image's slower clean-up is needed only if that ever fails
    verts, faces, _, _ = marching_cubes(grid, level=0.0, allow_degenerate=True, mask=visit)
    if measures.has_degenerate_faces(verts, faces):
        verts, faces, _, _ = marching_cubes(grid, level=0.0, allow_degenerate=False, mask=visit)
    return verts.astype(np.float64), faces.astype(np.int64), evaluations, low, high


def _edge_keys(g: np.ndarray, cells) -> np.ndarray:
    """(n,) int64 id of the grid edge each marching-cubes vertex (n, 3) lies on, in global cell
    units: two coordinates are whole numbers, the third lies strictly between two."""
    rounded = np.round(g)
    along = np.argmax(np.abs(g - rounded), axis=1)
    base = rounded.astype(np.int64)
    rows = np.arange(len(g))
    base[rows, along] = np.floor(g[rows, along]).astype(np.int64)
    n = np.asarray(cells, dtype=np.int64) + 1
    return ((base[:, 0] * n[1] + base[:, 1]) * n[2] + base[:, 2]) * 3 + along


def raise_empty(grid: np.ndarray):
    from ..errors import SolverFailure

    where = "entirely outside" if np.min(grid) >= 0 else "entirely inside"
    raise SolverFailure(f"the field has no surface in the extraction box (the box is {where} the shape): the edit collapsed or moved the shape away; try a gentler setting")


def bounds_of(points: np.ndarray, margin: float = 0.02) -> tuple[np.ndarray, np.ndarray]:
    """Box around (n, 3) points grown by ``margin`` times its longest side."""
    lo, hi = points.min(axis=0), points.max(axis=0)
    pad = margin * float(np.max(hi - lo))
    return lo - pad, hi + pad
