"""A field stored as a grid of cubic B-spline coefficients: C2, cheap to evaluate and to fit on a CPU."""

from __future__ import annotations

import numpy as np
import torch

from .base import SDFField
from .grids import DEFAULT_HALF_EXTENT, DenseGrid, dense_grid_from_distances


def cubic_bspline_weights(t: torch.Tensor) -> torch.Tensor:
    """Uniform cubic B-spline basis at fractional offsets t (..., ) -> (..., 4); C2 in t."""
    t2 = t * t
    t3 = t2 * t
    one = 1.0 - t
    return torch.stack(
        [one * one * one / 6.0, (3 * t3 - 6 * t2 + 4) / 6.0, (-3 * t3 + 3 * t2 + 3 * t + 1) / 6.0, t3 / 6.0], dim=-1
    )


class SplineSDF(SDFField):
    """f(x) = sum over the 4x4x4 nearest nodes of B(t_x) B(t_y) B(t_z) c_ijk.

    resolution : cells per axis of the grid spanning [-half_extent, half_extent]^3
    coefficients : (resolution + 3)^3 parameters (one extra node each side for the support)
    Outside the grid the field grows by the distance to the grid box, so it stays a
    sensible distance bound far away.
    """

    kind = "spline"

    def __init__(self, resolution: int = 128, half_extent: float = DEFAULT_HALF_EXTENT, coefficients=None):
        super().__init__()
        self.resolution = int(resolution)
        self.half_extent = float(half_extent)
        side = self.resolution + 3
        if coefficients is None:
            coefficients = torch.zeros(side, side, side)
        self.coefficients = torch.nn.Parameter(torch.as_tensor(coefficients, dtype=torch.float32).reshape(side, side, side))
        o = torch.arange(4)
        offsets = (o[:, None, None] * side * side + o[None, :, None] * side + o[None, None, :]).reshape(-1)
        self.register_buffer("_offsets", offsets, persistent=False)

    @property
    def cell(self) -> float:
        return 2.0 * self.half_extent / self.resolution

    def node_positions(self) -> np.ndarray:
        """(resolution + 3,) coordinates of the coefficient nodes along each axis (node -1 .. R+1)."""
        return self.grid().node_positions()

    def config(self) -> dict:
        return {"resolution": self.resolution, "half_extent": self.half_extent}

    def forward(self, points: torch.Tensor) -> torch.Tensor:
        e = self.half_extent
        inside = points.clamp(-e, e)
        u = (inside + e) / self.cell
        base = torch.floor(u.detach()).clamp_(0, self.resolution - 1)
        t = u - base
        w = cubic_bspline_weights(t)  # (n, 3, 4)
        weights = (w[:, 0, :, None, None] * w[:, 1, None, :, None] * w[:, 2, None, None, :]).reshape(-1, 64)
        side = self.resolution + 3
        b = base.long()
        corner = (b[:, 0] * side + b[:, 1]) * side + b[:, 2]
        values = self.coefficients.reshape(-1)[corner[:, None] + self._offsets]
        f = (values * weights).sum(dim=1)
        outside = points - inside
        # distance to the grid box; the epsilon keeps the gradient finite at zero
        return f + torch.sqrt((outside * outside).sum(dim=1) + 1e-12) - 1e-6

    def fast_values(self, points: np.ndarray) -> np.ndarray:
        """Values only, (n, 3) -> (n,) float32, compiled (DenseGrid.fast_values); same function as
        forward() (to float32 rounding); used where no derivatives are needed."""
        return self.grid().fast_values(points)

    def grid(self) -> DenseGrid:
        """The same field as a plain grid, sharing the coefficients (no copy)."""
        return DenseGrid(self.resolution, self.half_extent, self.coefficients.detach().cpu().numpy())

    @classmethod
    def from_grid(cls, grid: DenseGrid) -> "SplineSDF":
        return cls(grid.resolution, grid.half_extent, torch.from_numpy(np.ascontiguousarray(grid.coefficients, dtype=np.float32)))


def spline_from_node_values(values: np.ndarray, half_extent: float = DEFAULT_HALF_EXTENT) -> SplineSDF:
    """A SplineSDF that interpolates signed distances given at its nodes.

    values : (R + 3, R + 3, R + 3) float, the field at node_positions() along each axis
    (nodes -1 .. R+1). Cubic B-spline prefiltering (Unser 1999, "Splines: a perfect fit
    for signal and image processing") turns samples into coefficients so the spline passes
    through every sample.
    """
    import scipy.ndimage

    values = np.asarray(values, dtype=np.float64)
    side = values.shape[0]
    coefficients = scipy.ndimage.spline_filter(values, order=3, mode="mirror", output=np.float64)
    return SplineSDF(side - 3, half_extent, torch.from_numpy(coefficients.astype(np.float32)))


def spline_from_distances(values: np.ndarray, half_extent: float = DEFAULT_HALF_EXTENT) -> SplineSDF:
    """A SplineSDF approximating distances sampled at its nodes (grids.dense_grid_from_distances)."""
    return SplineSDF.from_grid(dense_grid_from_distances(values, half_extent))
