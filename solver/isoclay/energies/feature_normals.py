"""Feature-preserving normal fields on a narrow band of grid nodes: bilateral filtering of the
level-set normals, so noise (normals scattered at small scale) averages out while creases
(normals jumping consistently between two faces) stay sharp.

Each node's normal becomes the average of its neighbours' normals weighted by distance and by
normal similarity (bilateral filter, Tomasi & Manduchi 1998, "Bilateral filtering for gray and
color images"; applied to surface normals by Jones, Durand & Desbrun 2003, "Non-iterative,
feature-preserving mesh smoothing", and Zheng, Fu, Au & Tai 2011, "Bilateral normal filtering
for mesh denoising"). Normals across a crease differ a lot, get almost no weight, and the
crease survives; repeated small passes reach the requested scale at a fraction of the cost of
one wide pass.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .curvature_flow import BAND_CELLS, Band, NodeGrid, narrow_band

#: Neighbourhood of one pass: offsets within this many cells (33 nodes at 2 cells).
PASS_RADIUS_CELLS = 2.0
#: Spatial standard deviation of one pass, in cells; passes add variances.
PASS_SIGMA_CELLS = 1.0


@dataclass(frozen=True)
class FilteredNormals:
    """normals : (S^3, 3) float64 unit target normals on the flat grid (zero off the band);
    band : the nodes they were filtered on; passes : how many bilateral passes ran."""

    normals: np.ndarray
    band: Band
    passes: int


def ball_offsets(radius_cells: float, strides) -> tuple[np.ndarray, np.ndarray]:
    """Flat index offsets (k,) and squared lengths in cells (k,) of grid offsets within a ball."""
    r = int(np.floor(radius_cells))
    o = np.arange(-r, r + 1)
    d = np.stack(np.meshgrid(o, o, o, indexing="ij"), axis=-1).reshape(-1, 3)
    length2 = (d * d).sum(1)
    keep = length2 <= radius_cells * radius_cells + 1e-9
    d, length2 = d[keep], length2[keep]
    return d @ np.asarray(strides), length2.astype(np.float64)


def band_normals(grid: NodeGrid, band: Band) -> np.ndarray:
    """(n, 3) unit normals grad phi / |grad phi| at band nodes by central differences."""
    flat = grid.values.reshape(-1)
    g = np.stack([flat[band.index + s] - flat[band.index - s] for s in band.strides], axis=1)
    return g / np.maximum(np.linalg.norm(g, axis=1, keepdims=True), 1e-12)


def passes_for_scale(scale: float, cell: float) -> int:
    """Bilateral passes whose combined spatial standard deviation reaches scale / 2.

    A bump of size `scale` spans about two standard deviations of the combined kernel, so
    bumps up to that size are averaged away (common practice, no source).
    """
    sigma_cells = 0.5 * scale / cell
    return max(1, int(np.ceil((sigma_cells / PASS_SIGMA_CELLS) ** 2)))


def bilateral_normals(
    grid: NodeGrid,
    scale: float,
    range_sigma: float = 0.15,
    max_passes: int = 64,
    should_stop=None,
    guide_cells: float = 0.0,
    excluded: np.ndarray | None = None,
) -> FilteredNormals:
    """Feature-preserving filtered normals at the scale of `scale` (unit-box length).

    range_sigma : standard deviation of the similarity weight exp(-|n_p - n_q|^2 / (2 s^2)); at
        0.15 neighbours across a crease of 30 degrees or more weigh below 0.01. Measured on the
        bench's noisy chamfered block (9k vertices, 96 grid, strength 0.05): feature-region
        normal error 12.2 deg at 0.15, 14.7 at 0.2, 14.3 at 0.35 (strength 0.02).
    guide_cells : when > 0, the similarity is read from the normals of a copy of the grid blurred
        by a Gaussian of this many cells (a joint bilateral filter, as in the guided normal
        filtering of Zhang et al. 2015): noise as steep as a crease (noise at the vertex spacing)
        no longer protects itself, while the two sides of a crease still differ after the blur.
        The weights are then fixed and each pass is a plain weighted average.
    excluded : (S^3,) bool or None: nodes that neither lend nor take normals (the cap a field puts
        over an open scan's hole); they keep their own normal
    """
    band = narrow_band(grid, BAND_CELLS + 1.5)
    n = band_normals(grid, band).astype(np.float32)  # float32 halves the memory traffic of the passes
    slot = np.full(grid.values.size, -1, dtype=np.int64)
    slot[band.index] = np.arange(len(band.index))
    if excluded is not None:
        slot[excluded] = -1
    offsets, length2 = ball_offsets(PASS_RADIUS_CELLS, band.strides)
    spatial = np.exp(-length2 / (2.0 * PASS_SIGMA_CELLS**2)).astype(np.float32)
    passes = min(max_passes, passes_for_scale(scale, grid.cell))
    inv2r = np.float32(1.0 / (2.0 * range_sigma**2))
    neighbours = [slot[band.index + off].astype(np.int32) for off in offsets]  # fixed across passes
    own = slot[band.index] >= 0
    start = n.copy()
    if guide_cells > 0:
        import scipy.ndimage
        import scipy.sparse

        blurred = grid.copy()
        blurred.values = scipy.ndimage.gaussian_filter(grid.values, guide_cells, mode="nearest", truncate=3.0)
        guide = band_normals(blurred, band).astype(np.float32)
        m = len(n)
        k = len(offsets)
        cols = np.empty((m, k), dtype=np.int32)
        weights = np.empty((m, k), dtype=np.float32)
        rows = np.arange(m, dtype=np.int32)
        for j, (nb, ws) in enumerate(zip(neighbours, spatial)):
            valid = nb >= 0
            q = np.where(valid, nb, rows)  # an empty slot points at the node itself with weight 0
            cols[:, j] = q
            weights[:, j] = np.exp(-((guide - guide[q]) ** 2).sum(1) * inv2r) * (ws * valid)
        del neighbours
        # k entries per row, already grouped by row: CSR without a sort
        matrix = scipy.sparse.csr_matrix((weights.ravel(), cols.ravel(), np.arange(m + 1, dtype=np.int64) * k), shape=(m, m))
        for _ in range(passes):
            if should_stop is not None and should_stop():
                from ..errors import Cancelled

                raise Cancelled("cancelled during normal filtering; nothing was written")
            acc = matrix @ n
            n = (acc / np.maximum(np.linalg.norm(acc, axis=1, keepdims=True), 1e-12)).astype(np.float32)
            n[~own] = start[~own]
    else:
        for _ in range(passes):
            if should_stop is not None and should_stop():
                from ..errors import Cancelled

                raise Cancelled("cancelled during normal filtering; nothing was written")
            acc = np.zeros_like(n)
            for nb, ws in zip(neighbours, spatial):
                valid = nb >= 0
                q = n[np.where(valid, nb, 0)]
                w = np.exp(-((n - q) ** 2).sum(1) * inv2r)
                w *= ws * valid
                acc += w[:, None] * q
            n = acc / np.maximum(np.linalg.norm(acc, axis=1, keepdims=True), 1e-12)
            n[~own] = start[~own]
    full = np.zeros((grid.values.size, 3))  # float64 for the flow's divergence
    full[band.index] = n
    return FilteredNormals(full, band, passes)
