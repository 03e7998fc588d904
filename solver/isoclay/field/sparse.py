"""A fine cubic B-spline stored in blocks near the surface, on top of a coarse dense one.

f(x) = coarse(x) + sum over the 4x4x4 nearest fine nodes of B(t_x) B(t_y) B(t_z) r_ijk, with the
fine residual coefficients r held only in blocks of BLOCK^3 where the surface needs them (the
idea of sparse volumes: a table of blocks, most of them absent; absent coefficients are zero).
Both terms are cubic B-splines, so f is C2 everywhere, including where fine blocks begin and end;
far from the surface f is the coarse field, whose sign is right there. Memory grows with the area
of the refined surface, not with the box.
"""

from __future__ import annotations

import numba
import numpy as np
import torch

from .base import SDFField
from .distances import BLOCK
from .kernels import spline_values, weights_at
from .spline import DEFAULT_HALF_EXTENT, SplineSDF, cubic_bspline_weights


class SparseSplineSDF(SDFField):
    """coarse : a SplineSDF over the same box; resolution : fine cells per axis (a multiple of the
    coarse resolution); blocks : (n, 3) int block coordinates of the fine coefficient lattice
    (node k at -half_extent + cell * (k - 1), as SplineSDF); coefficients : (n, B, B, B) residual."""

    kind = "sparse_spline"

    def __init__(self, resolution: int = 1024, half_extent: float = DEFAULT_HALF_EXTENT, coarse_resolution: int = 128,
                 blocks: int | np.ndarray = 0, coefficients=None, coarse: SplineSDF | None = None):
        super().__init__()
        self.resolution = int(resolution)
        self.half_extent = float(half_extent)
        self.coarse_resolution = int(coarse_resolution)
        self.coarse = coarse if coarse is not None else SplineSDF(self.coarse_resolution, self.half_extent)
        if isinstance(blocks, (int, np.integer)):
            blocks = np.zeros((int(blocks), 3), dtype=np.int32)
        blocks = torch.as_tensor(np.asarray(blocks, dtype=np.int32))
        if coefficients is None:
            coefficients = torch.zeros(len(blocks), BLOCK, BLOCK, BLOCK)
        self.coefficients = torch.nn.Parameter(torch.as_tensor(coefficients, dtype=torch.float32).reshape(-1, BLOCK, BLOCK, BLOCK))
        self.register_buffer("blocks", blocks)
        self._table = None

    # ------------------------------------------------------------------ layout
    @property
    def cell(self) -> float:
        return 2.0 * self.half_extent / self.resolution

    @property
    def side(self) -> int:
        return self.resolution + 3

    def table(self) -> np.ndarray:
        """(nb, nb, nb) int32 block id of each block of the fine lattice, -1 where absent."""
        if self._table is None or self._table_blocks is not self.blocks:
            nb = -(-self.side // BLOCK)
            table = np.full((nb, nb, nb), -1, dtype=np.int32)
            b = self.blocks.cpu().numpy()
            table[tuple(b.T)] = np.arange(len(b), dtype=np.int32)
            self._table, self._table_blocks = table, self.blocks
            self._table_t = torch.from_numpy(table.reshape(-1).astype(np.int64))
        return self._table

    def config(self) -> dict:
        return {"resolution": self.resolution, "half_extent": self.half_extent,
                "coarse_resolution": self.coarse_resolution, "blocks": int(self.blocks.shape[0])}

    def nbytes(self) -> int:
        """Bytes held by the field: coefficients (coarse and fine), block list and table."""
        table = (-(-self.side // BLOCK)) ** 3 * 4
        return int(self.coefficients.numel() * 4 + self.coarse.coefficients.numel() * 4 + self.blocks.numel() * 4 + table)

    # ------------------------------------------------------------------ evaluation
    def forward(self, points: torch.Tensor) -> torch.Tensor:
        self.table()
        e, h, b3 = self.half_extent, self.cell, BLOCK**3
        inside = points.clamp(-e, e)
        u = (inside + e) / h
        base = torch.floor(u.detach()).clamp_(0, self.resolution - 1)
        w = cubic_bspline_weights(u - base)  # (n, 3, 4)
        weights = (w[:, 0, :, None, None] * w[:, 1, None, :, None] * w[:, 2, None, None, :]).reshape(-1, 64)
        idx = base.long()[:, :, None] + torch.arange(4)  # (n, 3, 4) lattice indices
        blk, loc = idx // BLOCK, idx % BLOCK
        nb = self._table.shape[0]
        bid = ((blk[:, 0, :, None, None] * nb + blk[:, 1, None, :, None]) * nb + blk[:, 2, None, None, :]).reshape(-1, 64)
        lid = ((loc[:, 0, :, None, None] * BLOCK + loc[:, 1, None, :, None]) * BLOCK + loc[:, 2, None, None, :]).reshape(-1, 64)
        block = self._table_t.to(points.device)[bid]
        flat = torch.where(block >= 0, block * b3 + lid, torch.full_like(lid, self.coefficients.numel()))
        storage = torch.cat([self.coefficients.reshape(-1), self.coefficients.new_zeros(1)])
        return self.coarse(points) + (storage[flat] * weights).sum(dim=1)

    def fast_values(self, points: np.ndarray) -> np.ndarray:
        """Values only, (n, 3) -> (n,) float32, compiled (numba); same function as forward()."""
        p = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        coarse = _dense_values(p, self.coarse)
        fine = self.coefficients.detach().cpu().numpy()
        out = _residual_values(p, self.half_extent, self.cell, self.resolution, self.table(), fine)
        return (coarse + out).astype(np.float32)

    def residual_at_nodes(self, index: np.ndarray) -> np.ndarray:
        """Fine residual (k,) at fine lattice nodes (k, 3) (B-spline at integer offsets)."""
        return _residual_nodes(np.ascontiguousarray(index, dtype=np.int64), self.table(),
                               self.coefficients.detach().cpu().numpy())

    def node_positions(self) -> np.ndarray:
        """(resolution + 3,) fine lattice node coordinates along each axis."""
        return -self.half_extent + self.cell * (np.arange(self.side) - 1.0)

    @classmethod
    def from_config(cls, config: dict) -> "SparseSplineSDF":
        return cls(config["resolution"], config["half_extent"], config["coarse_resolution"], int(config["blocks"]))

    def _load_from_state_dict(self, state_dict, prefix, *args, **kwargs):
        super()._load_from_state_dict(state_dict, prefix, *args, **kwargs)
        self._table = None


def _dense_values(p: np.ndarray, spline: SplineSDF) -> np.ndarray:
    """A dense SplineSDF's values at (n, 3) float64 points (numba; same as its forward)."""
    c = spline.coefficients.detach().cpu().numpy()
    return spline_values(p, spline.half_extent, spline.cell, spline.resolution, c)


@numba.njit(cache=True)
def _residual_values(p, e, h, r, table, coef):
    n = p.shape[0]
    out = np.zeros(n)
    wx = np.empty(4)
    wy = np.empty(4)
    wz = np.empty(4)
    for q in range(n):
        bx, by, bz, _, _, _ = weights_at(p, q, e, h, r, wx, wy, wz)
        s = 0.0
        for a in range(4):
            i = bx + a
            for b in range(4):
                j = by + b
                wab = wx[a] * wy[b]
                for d in range(4):
                    k = bz + d
                    blk = table[i // BLOCK, j // BLOCK, k // BLOCK]
                    if blk >= 0:
                        s += wab * wz[d] * coef[blk, i % BLOCK, j % BLOCK, k % BLOCK]
        out[q] = s
    return out


@numba.njit(cache=True)
def _residual_nodes(index, table, coef):
    n = index.shape[0]
    out = np.zeros(n)
    w = (1.0 / 6.0, 4.0 / 6.0, 1.0 / 6.0)
    lim = table.shape[0] * BLOCK
    for q in range(n):
        s = 0.0
        for a in range(3):
            i = index[q, 0] + a - 1
            for b in range(3):
                j = index[q, 1] + b - 1
                for d in range(3):
                    k = index[q, 2] + d - 1
                    if i < 0 or j < 0 or k < 0 or i >= lim or j >= lim or k >= lim:
                        continue
                    blk = table[i // BLOCK, j // BLOCK, k // BLOCK]
                    if blk >= 0:
                        s += w[a] * w[b] * w[d] * coef[blk, i % BLOCK, j % BLOCK, k % BLOCK]
        out[q] = s
    return out


@numba.njit(cache=True)
def _neighbour(table, blocks, b, axis, step):
    i, j, k = blocks[b, 0], blocks[b, 1], blocks[b, 2]
    if axis == 0:
        i += step
    elif axis == 1:
        j += step
    else:
        k += step
    if i < 0 or j < 0 or k < 0 or i >= table.shape[0] or j >= table.shape[1] or k >= table.shape[2]:
        return -1
    return table[i, j, k]


@numba.njit(cache=True)
def _stencil(values, table, blocks, axis, side, centre):
    """out = side * (v[-1] + v[+1]) + centre * v along one axis (absent nodes count as 0).
    Works on values moved so ``axis`` is the last one; neighbour blocks looked up once each."""
    out = np.empty_like(values)
    last = BLOCK - 1
    for b in range(blocks.shape[0]):
        lo = _neighbour(table, blocks, b, axis, -1)
        hi = _neighbour(table, blocks, b, axis, 1)
        for p in range(BLOCK):
            for q in range(BLOCK):
                for r in range(BLOCK):
                    if axis == 0:
                        c = values[b, r, p, q]
                        before = values[b, r - 1, p, q] if r > 0 else (values[lo, last, p, q] if lo >= 0 else 0.0)
                        after = values[b, r + 1, p, q] if r < last else (values[hi, 0, p, q] if hi >= 0 else 0.0)
                        out[b, r, p, q] = side * (before + after) + centre * c
                    elif axis == 1:
                        c = values[b, p, r, q]
                        before = values[b, p, r - 1, q] if r > 0 else (values[lo, p, last, q] if lo >= 0 else 0.0)
                        after = values[b, p, r + 1, q] if r < last else (values[hi, p, 0, q] if hi >= 0 else 0.0)
                        out[b, p, r, q] = side * (before + after) + centre * c
                    else:
                        c = values[b, p, q, r]
                        before = values[b, p, q, r - 1] if r > 0 else (values[lo, p, q, last] if lo >= 0 else 0.0)
                        after = values[b, p, q, r + 1] if r < last else (values[hi, p, q, 0] if hi >= 0 else 0.0)
                        out[b, p, q, r] = side * (before + after) + centre * c
    return out


def smoothed_coefficients(values: np.ndarray, table: np.ndarray, blocks: np.ndarray) -> np.ndarray:
    """Block-sparse version of spline.spline_from_distances: c = v - B^2(L v) / 6 (absent nodes count as 0).

    values : (n, B, B, B) node values; returns coefficients of the same shape.
    """
    v = np.ascontiguousarray(values, dtype=np.float64)
    b = np.ascontiguousarray(blocks, dtype=np.int64)
    lap = sum(_stencil(v, table, b, axis, 1.0, -2.0) for axis in range(3))
    for _ in range(2):
        for axis in range(3):
            lap = _stencil(lap, table, b, axis, 1.0 / 6.0, 4.0 / 6.0)
    return v - lap / 6.0


def sparse_spline_from_function(sdf, resolution: int = 1024, coarse_resolution: int = 128, band_cells: float = 4.0,
                                half_extent: float = DEFAULT_HALF_EXTENT) -> SparseSplineSDF:
    """A SparseSplineSDF of a field known everywhere (an analytic SDFField, for references and
    tests): the coarse spline from its values at every coarse node, fine blocks wherever a fine
    node lies within ``band_cells`` fine cells of the surface (no refinement criterion: every
    block near the surface is stored). Same quasi-interpolant as fitting (spline.spline_from_distances)."""
    from ..geometry.derivatives import values as field_values
    from .spline import spline_from_distances

    hc = 2.0 * half_extent / coarse_resolution
    axis = -half_extent + hc * (np.arange(coarse_resolution + 3) - 1.0)
    grid = np.stack(np.meshgrid(axis, axis, axis, indexing="ij"), axis=-1).reshape(-1, 3)
    coarse = spline_from_distances(field_values(sdf, grid).astype(np.float64).reshape((len(axis),) * 3), half_extent)
    h = 2.0 * half_extent / resolution
    side = resolution + 3
    # candidate fine blocks: those whose centre lies within the band plus a block's half-diagonal
    nb = -(-side // BLOCK)
    centres = -half_extent + h * ((np.indices((nb,) * 3).reshape(3, -1).T + 0.5) * BLOCK - 1.5)
    near = np.abs(field_values(sdf, centres)) < band_cells * h + 0.5 * np.sqrt(3) * BLOCK * h
    blocks = np.indices((nb,) * 3).reshape(3, -1).T[near].astype(np.int32)
    local = np.indices((BLOCK,) * 3).reshape(3, -1).T
    ijk = (blocks[:, None, :].astype(np.int64) * BLOCK + local[None]).reshape(-1, 3)
    pts = -half_extent + h * (ijk - 1.0)
    exact = field_values(sdf, pts).astype(np.float64)
    residual = np.where(np.abs(exact) < band_cells * h, exact - coarse.fast_values(pts), 0.0)
    residual = residual.reshape(len(blocks), BLOCK, BLOCK, BLOCK)
    table = np.full((nb,) * 3, -1, dtype=np.int32)
    table[tuple(blocks.T)] = np.arange(len(blocks), dtype=np.int32)
    keep = np.abs(residual).reshape(len(blocks), -1).max(axis=1) > 0
    coefficients = smoothed_coefficients(residual, table, blocks)
    blocks, coefficients = blocks[keep], coefficients[keep]
    return SparseSplineSDF(resolution, half_extent, coarse_resolution, blocks, torch.from_numpy(coefficients.astype(np.float32)), coarse)


def _basis_matrix(axis: np.ndarray, spline: SplineSDF) -> np.ndarray:
    """(len(axis), R + 3) cubic B-spline weights of a dense spline's coefficients at coordinates."""
    e, h, r = spline.half_extent, spline.cell, spline.resolution
    x = np.clip(axis, -e, e)
    u = (x + e) / h
    base = np.clip(np.floor(u), 0, r - 1).astype(np.int64)
    w = cubic_bspline_weights(torch.from_numpy(u - base)).numpy()
    m = np.zeros((len(axis), r + 3))
    for o in range(4):
        m[np.arange(len(axis)), base + o] = w[:, o]
    return m


def grid_values(field: "SparseSplineSDF | SplineSDF", axis: np.ndarray) -> np.ndarray:
    """The field at every node of the tensor grid axis x axis x axis: (S, S, S) float64.

    The coarse spline is separable (three matrix products, no per-node gathers); the fine
    residual is added only at nodes inside the support of a stored block, so the cost grows
    with the refined surface, not the grid."""
    axis = np.asarray(axis, dtype=np.float64)
    spline = field.coarse if isinstance(field, SparseSplineSDF) else field
    m = _basis_matrix(axis, spline)
    c = spline.coefficients.detach().double().cpu().numpy()
    out = np.einsum("ia,abc->ibc", m, c)
    out = np.einsum("jb,ibc->ijc", m, out)
    out = np.einsum("kc,ijc->ijk", m, out)
    outside = axis - np.clip(axis, -spline.half_extent, spline.half_extent)
    o2 = outside**2
    out += np.sqrt(o2[:, None, None] + o2[None, :, None] + o2[None, None, :] + 1e-12) - 1e-6
    if not isinstance(field, SparseSplineSDF) or len(field.blocks) == 0:
        return out
    # nodes whose 4x4x4 fine support touches a stored block
    h, e = field.cell, field.half_extent
    b = field.blocks.cpu().numpy().astype(np.int64)
    lo_pos = -e + h * (b * BLOCK - 1 - 2)  # lattice index k sits at -e + h (k - 1); support reaches 2 cells
    hi_pos = -e + h * (b * BLOCK + BLOCK - 1 - 1 + 2)
    first = np.searchsorted(axis, lo_pos, side="left")
    last = np.searchsorted(axis, hi_pos, side="right")
    marked = np.zeros(out.shape, dtype=bool)
    for (i0, j0, k0), (i1, j1, k1) in zip(first, last):
        marked[i0:i1, j0:j1, k0:k1] = True
    flat = np.flatnonzero(marked)
    i, j, k = np.unravel_index(flat, out.shape)
    pts = np.stack([axis[i], axis[j], axis[k]], axis=1)
    out.reshape(-1)[flat] += _residual_values(pts, e, h, field.resolution, field.table(),
                                              field.coefficients.detach().cpu().numpy())
    return out
