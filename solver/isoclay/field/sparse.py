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
    return _spline_values(p, spline.half_extent, spline.cell, spline.resolution, c)


@numba.njit(cache=True)
def _basis(t):
    one = 1.0 - t
    t2 = t * t
    t3 = t2 * t
    return one * one * one / 6.0, (3 * t3 - 6 * t2 + 4) / 6.0, (-3 * t3 + 3 * t2 + 3 * t + 1) / 6.0, t3 / 6.0


@numba.njit(cache=True)
def _locate(x, e, h, r):
    xc = min(max(x, -e), e)
    u = (xc + e) / h
    b = min(max(int(np.floor(u)), 0), r - 1)
    return b, u - b, x - xc


@numba.njit(cache=True)
def _spline_values(p, e, h, r, c):
    n = p.shape[0]
    out = np.empty(n)
    wx = np.empty(4)
    wy = np.empty(4)
    wz = np.empty(4)
    for q in range(n):
        bx, tx, ox = _locate(p[q, 0], e, h, r)
        by, ty, oy = _locate(p[q, 1], e, h, r)
        bz, tz, oz = _locate(p[q, 2], e, h, r)
        wx[0], wx[1], wx[2], wx[3] = _basis(tx)
        wy[0], wy[1], wy[2], wy[3] = _basis(ty)
        wz[0], wz[1], wz[2], wz[3] = _basis(tz)
        s = 0.0
        for a in range(4):
            for b in range(4):
                wab = wx[a] * wy[b]
                for d in range(4):
                    s += wab * wz[d] * c[bx + a, by + b, bz + d]
        out[q] = s + np.sqrt(ox * ox + oy * oy + oz * oz + 1e-12) - 1e-6
    return out


@numba.njit(cache=True)
def _residual_values(p, e, h, r, table, coef):
    n = p.shape[0]
    out = np.zeros(n)
    wx = np.empty(4)
    wy = np.empty(4)
    wz = np.empty(4)
    for q in range(n):
        bx, tx, _ = _locate(p[q, 0], e, h, r)
        by, ty, _ = _locate(p[q, 1], e, h, r)
        bz, tz, _ = _locate(p[q, 2], e, h, r)
        wx[0], wx[1], wx[2], wx[3] = _basis(tx)
        wy[0], wy[1], wy[2], wy[3] = _basis(ty)
        wz[0], wz[1], wz[2], wz[3] = _basis(tz)
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
def _with_halo(values, table, blocks):
    """(n, B+2, B+2, B+2) copies of each block with one node of its neighbours around (0 where absent)."""
    n = blocks.shape[0]
    out = np.zeros((n, BLOCK + 2, BLOCK + 2, BLOCK + 2))
    nb0, nb1, nb2 = table.shape
    for b in range(n):
        for a in range(BLOCK + 2):
            i = blocks[b, 0] * BLOCK + a - 1
            for c in range(BLOCK + 2):
                j = blocks[b, 1] * BLOCK + c - 1
                for d in range(BLOCK + 2):
                    k = blocks[b, 2] * BLOCK + d - 1
                    if i < 0 or j < 0 or k < 0:
                        continue
                    bi, bj, bk = i // BLOCK, j // BLOCK, k // BLOCK
                    if bi >= nb0 or bj >= nb1 or bk >= nb2:
                        continue
                    blk = table[bi, bj, bk]
                    if blk >= 0:
                        out[b, a, c, d] = values[blk, i % BLOCK, j % BLOCK, k % BLOCK]
    return out


def smoothed_coefficients(values: np.ndarray, table: np.ndarray, blocks: np.ndarray) -> np.ndarray:
    """Block-sparse version of spline.spline_from_distances: c = v - B^2(L v) / 6 (absent nodes count as 0).

    values : (n, B, B, B) node values; returns coefficients of the same shape.
    """
    v = np.asarray(values, dtype=np.float64)
    s = slice(1, BLOCK + 1)
    halo = _with_halo(v, table, blocks)
    lap = np.zeros_like(v)
    for axis in range(3):
        lo = [s, s, s]
        hi = [s, s, s]
        lo[axis] = slice(0, BLOCK)
        hi[axis] = slice(2, BLOCK + 2)
        lap += halo[(slice(None), *lo)] + halo[(slice(None), *hi)] - 2.0 * v
    for _ in range(2):
        for axis in range(3):
            halo = _with_halo(lap, table, blocks)
            lo = [s, s, s]
            hi = [s, s, s]
            lo[axis] = slice(0, BLOCK)
            hi[axis] = slice(2, BLOCK + 2)
            lap = (halo[(slice(None), *lo)] + halo[(slice(None), *hi)] + 4.0 * lap) / 6.0
    return v - lap / 6.0


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
