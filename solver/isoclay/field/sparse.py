"""A fine cubic B-spline stored in blocks near the surface, on top of a coarse dense one.

f(x) = coarse(x) + sum over the 4x4x4 nearest fine nodes of B(t_x) B(t_y) B(t_z) r_ijk, with the
fine residual coefficients r held only in blocks of BLOCK^3 where the surface needs them (the
idea of sparse volumes: a table of blocks, most of them absent; absent coefficients are zero).
Both terms are cubic B-splines, so f is C2 everywhere, including where fine blocks begin and end;
far from the surface f is the coarse field, whose sign is right there. Memory grows with the area
of the refined surface, not with the box.
"""

from __future__ import annotations

import numpy as np
import torch

from .base import SDFField
from .distances import BLOCK
from .grids import DEFAULT_HALF_EXTENT, SparseGrid, block_table, smoothed_coefficients
from .spline import SplineSDF, cubic_bspline_weights


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
            table = block_table(self.side, self.blocks.cpu().numpy())
            self._table, self._table_blocks = table, self.blocks
            self._table_t = torch.from_numpy(table.reshape(-1).astype(np.int64))
        return self._table

    def config(self) -> dict:
        return {"resolution": self.resolution, "half_extent": self.half_extent,
                "coarse_resolution": self.coarse_resolution, "blocks": int(self.blocks.shape[0])}

    def nbytes(self) -> int:
        """Bytes held by the field: coefficients (coarse and fine), block list and table."""
        return self.grid().nbytes()

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
        """Values only, (n, 3) -> (n,) float32, compiled (SparseGrid.fast_values); same function as forward()."""
        return self.grid().fast_values(points)

    def residual_at_nodes(self, index: np.ndarray) -> np.ndarray:
        """Fine residual (k,) at fine lattice nodes (k, 3) (B-spline at integer offsets)."""
        return self.grid().residual_at_nodes(index)

    def node_positions(self) -> np.ndarray:
        """(resolution + 3,) fine lattice node coordinates along each axis."""
        return self.grid().node_positions()

    def grid(self) -> SparseGrid:
        """The same field as a plain grid, sharing the coefficients and the block table (no copy)."""
        return SparseGrid(self.resolution, self.half_extent, self.coarse_resolution, self.blocks.cpu().numpy(),
                          self.coefficients.detach().cpu().numpy(), self.coarse.grid(), self.table())

    @classmethod
    def from_grid(cls, grid: SparseGrid) -> "SparseSplineSDF":
        coarse = SplineSDF.from_grid(grid.coarse)
        coefficients = torch.from_numpy(np.ascontiguousarray(grid.coefficients, dtype=np.float32))
        return cls(grid.resolution, grid.half_extent, grid.coarse_resolution, grid.blocks, coefficients, coarse)

    @classmethod
    def from_config(cls, config: dict) -> "SparseSplineSDF":
        return cls(config["resolution"], config["half_extent"], config["coarse_resolution"], int(config["blocks"]))

    def _load_from_state_dict(self, state_dict, prefix, *args, **kwargs):
        super()._load_from_state_dict(state_dict, prefix, *args, **kwargs)
        self._table = None


def sparse_spline_from_function(sdf, resolution: int = 1024, coarse_resolution: int = 128, band_cells: float = 4.0,
                                half_extent: float = DEFAULT_HALF_EXTENT) -> SparseSplineSDF:
    """A SparseSplineSDF of a field known everywhere (an analytic SDFField, for references and
    tests): the coarse spline from its values at every coarse node, fine blocks wherever a fine
    node lies within ``band_cells`` fine cells of the surface (no refinement criterion: every
    block near the surface is stored). Same quasi-interpolant as fitting (spline.spline_from_distances)."""
    from ..geometry.field_values import values as field_values
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
    table = block_table(side, blocks)
    keep = np.abs(residual).reshape(len(blocks), -1).max(axis=1) > 0
    coefficients = smoothed_coefficients(residual, table, blocks)
    blocks, coefficients = blocks[keep], coefficients[keep]
    return SparseSplineSDF(resolution, half_extent, coarse_resolution, blocks, torch.from_numpy(coefficients.astype(np.float32)), coarse)
