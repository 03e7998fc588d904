"""A smooth volumetric map over a solid's interior: a quadratic B-spline control lattice.

phi(x) = sum over the 3 x 3 x 3 control points of x's cell of B(t_x) B(t_y) B(t_z) c_k, with the
uniform quadratic B-spline B (C1: the deformed surface keeps continuous normals; it reproduces
linear and quadratic fields exactly, so a bend through a thin part is held even with two cells
across it). Only cells that hold some of the solid are active; what is inside comes from the
field (``values`` negative inside), integrated by sub-cell quadrature with a smeared indicator,
so open scans, loose touching parts and non-manifold props all have an interior.

Control points are split per connected piece of material within their support ("virtual
nodes", Molino, Bridson, Teran & Fedkiw 2004, "A crystalline, red green strategy for meshing
highly deformable objects with tetrahedra", applied to a spline lattice as in the finite cell
method, Parvizian, Duester & Rank 2007): two parts of a prop that pass within a cell or two of
each other (a hook's tip near its shank) do not share control points unless their cells
touch, so they are not glued together by the lattice.

Coordinates: unit-box lengths (see mesh.Normalization); cell size ``cell``.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
import scipy.ndimage

from ..callbacks import check_stop, never_stop

#: (27, 3) offsets of a cell's control points: cell c uses control points c + o, o in {0, 1, 2}^3.
OFFSETS = np.array(list(itertools.product(range(3), repeat=3)), dtype=np.int64)


def quadratic_bspline(t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Uniform quadratic B-spline weights and their t-derivatives at t (...,) -> ((..., 3), (..., 3))."""
    w = np.stack([0.5 * (1 - t) ** 2, 0.5 * (-2 * t * t + 2 * t + 1), 0.5 * t * t], axis=-1)
    dw = np.stack([t - 1, 1 - 2 * t, t], axis=-1)
    return w, dw


def tensor_basis(t: np.ndarray, cell: float) -> tuple[np.ndarray, np.ndarray]:
    """Weights of a cell's 27 control points at local coordinates t (n, 3) in [0, 1)^3 (extrapolates outside).

    Returns B (n, 27) and G (n, 27, 3), G[:, k, d] = dB_k / dx_d in unit-box lengths^-1.
    """
    w, dw = quadratic_bspline(np.asarray(t, dtype=np.float64))
    n = len(w)
    wx, wy, wz = w[:, 0, :, None, None], w[:, 1, None, :, None], w[:, 2, None, None, :]
    dx, dy, dz = dw[:, 0, :, None, None] / cell, dw[:, 1, None, :, None] / cell, dw[:, 2, None, None, :] / cell
    wyz = wy * wz
    g = np.empty((n, 3, 3, 3, 3))
    g[..., 0] = dx * wyz
    g[..., 1] = wx * (dy * wz)
    g[..., 2] = (wx * wy) * dz
    return (wx * wyz).reshape(n, 27), g.reshape(n, 27, 3)


def smeared_inside(values: np.ndarray, width: float) -> np.ndarray:
    """(n,) fraction inside, 1 well inside (value < -width/2), 0 outside, linear across the surface."""
    return np.clip(0.5 - np.asarray(values, dtype=np.float64) / width, 0.0, 1.0)


@dataclass(frozen=True)
class SplineLattice:
    """The active cells of a lattice and their control points (see module docstring).

    origin : (3,) corner of cell (0, 0, 0); cell : cell size; shape : (3,) cells per axis
    cells : (C, 3) int64 active cell indices; weights : (C, Q) quadrature weights (volume inside
        the solid carried by each sub-cell point, unit-box lengths^3); quadrature : (Q, 3) local
        coordinates of the sub-cell points
    dofs : (C, 27) control point (degree of freedom) of each active cell's 27 offsets
    rest : (n_dofs, 3) control positions for which phi is the identity
    cell_index : dense (shape) int64 grid, active cell number or -1
    """

    origin: np.ndarray
    cell: float
    shape: np.ndarray
    cells: np.ndarray
    weights: np.ndarray
    quadrature: np.ndarray
    dofs: np.ndarray
    rest: np.ndarray
    cell_index: np.ndarray

    @property
    def n_dofs(self) -> int:
        return int(self.rest.shape[0])

    @property
    def n_cells(self) -> int:
        return int(self.cells.shape[0])

    @property
    def volume(self) -> float:
        return float(self.weights.sum())

    @classmethod
    def build(cls, values, lo, hi, cell: float, subdivisions: int = 3, should_stop=never_stop) -> "SplineLattice":
        """Lattice over the box [lo, hi] (unit box) whose active cells hold the solid {values < 0}.

        values : callable (n, 3) float64 -> (n,) signed distances (negative inside)
        subdivisions : sub-cell quadrature points per axis in cells the surface crosses
        Raises ValueError when nothing of the solid lies in the box.
        """
        h = float(cell)
        origin = np.asarray(lo, dtype=np.float64) - h
        shape = np.maximum(np.ceil((np.asarray(hi, dtype=np.float64) + h - origin) / h).astype(np.int64), 1)
        grid = np.stack(np.meshgrid(*[np.arange(s) for s in shape], indexing="ij"), axis=-1).reshape(-1, 3)
        f_center = values(origin + (grid + 0.5) * h)
        half_diagonal = 0.5 * np.sqrt(3.0) * h
        full = f_center < -half_diagonal
        cut = ~full & (f_center < half_diagonal)
        s = int(subdivisions)
        quadrature = (np.array(list(itertools.product(range(s), repeat=3)), dtype=np.float64) + 0.5) / s
        inside = np.zeros((len(grid), len(quadrature)))
        inside[full] = 1.0
        cut_cells = np.flatnonzero(cut)
        for start in range(0, len(cut_cells), 65536):
            check_stop(should_stop, "lattice")
            chunk = cut_cells[start : start + 65536]
            points = origin + (grid[chunk][:, None, :] + quadrature[None]) * h
            inside[chunk] = smeared_inside(values(points.reshape(-1, 3)), h / s).reshape(len(chunk), -1)
        active = inside.sum(axis=1) > 1e-9 * len(quadrature)
        if not active.any():
            raise ValueError("no part of the solid lies in the lattice box")
        cells = grid[active]
        weights = inside[active] * (h**3 / len(quadrature))
        cell_index = -np.ones(tuple(shape), dtype=np.int64)
        cell_index[tuple(cells.T)] = np.arange(len(cells))
        dofs, rest = _virtual_nodes(cells, tuple(shape), origin, h)
        return cls(origin, h, shape, cells, weights, quadrature, dofs, rest, cell_index)

    # ---------------------------------------------------------------- evaluation

    def locate(self, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(active cell (n,), local coordinates t (n, 3)) of points; a point in an empty cell takes the
        nearest active cell among its 26 neighbours and extrapolates that cell's polynomial.

        Raises ValueError when a point is more than one cell away from every active cell.
        """
        p = np.asarray(points, dtype=np.float64).reshape(-1, 3)
        u = (p - self.origin) / self.cell
        c = np.clip(np.floor(u).astype(np.int64), 0, self.shape - 1)
        found = self.cell_index[tuple(c.T)]
        miss = np.flatnonzero(found < 0)
        if len(miss):
            best = np.full(len(miss), np.inf)
            best_cell = c[miss].copy()
            for d in itertools.product((-1, 0, 1), repeat=3):
                cc = np.clip(c[miss] + np.array(d), 0, self.shape - 1)
                idx = self.cell_index[tuple(cc.T)]
                box_lo = cc.astype(np.float64)
                gap = np.maximum(0.0, np.maximum(box_lo - u[miss], u[miss] - box_lo - 1.0))
                dist = np.einsum("ij,ij->i", gap, gap)
                better = (idx >= 0) & (dist < best)
                best[better] = dist[better]
                best_cell[better] = cc[better]
                found[miss[better]] = idx[better]
            if (found < 0).any():
                raise ValueError(f"{int((found < 0).sum())} points lie outside the deformable solid")
            c[miss] = best_cell
        return found, u - c

    def basis(self, points: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(dofs (n, 27), B (n, 27), G (n, 27, 3)) at points (see tensor_basis)."""
        found, t = self.locate(points)
        b, g = tensor_basis(t, self.cell)
        return self.dofs[found], b, g

    def map(self, control: np.ndarray, points: np.ndarray, chunk: int = 200_000) -> np.ndarray:
        """phi(points) (n, 3) for control positions (n_dofs, 3)."""
        out = np.empty((len(points), 3))
        for start in range(0, len(points), chunk):
            d, b, _ = self.basis(points[start : start + chunk])
            out[start : start + chunk] = np.einsum("nk,nka->na", b, control[d])
        return out

    def map_and_jacobian(self, control: np.ndarray, points: np.ndarray, chunk: int = 200_000):
        """(phi (n, 3), J (n, 3, 3)) at points, locating each point once."""
        x, jac = np.empty((len(points), 3)), np.empty((len(points), 3, 3))
        for start in range(0, len(points), chunk):
            d, b, g = self.basis(points[start : start + chunk])
            c = control[d]
            x[start : start + chunk] = np.einsum("nk,nka->na", b, c)
            jac[start : start + chunk] = np.einsum("nkd,nka->nad", g, c)
        return x, jac

    def jacobian(self, control: np.ndarray, points: np.ndarray, chunk: int = 200_000) -> np.ndarray:
        """(n, 3, 3) J[:, a, d] = d phi_a / d x_d at points."""
        out = np.empty((len(points), 3, 3))
        for start in range(0, len(points), chunk):
            d, _, g = self.basis(points[start : start + chunk])
            out[start : start + chunk] = np.einsum("nkd,nka->nad", g, control[d])
        return out

    def quadrature_jacobians(self, control: np.ndarray, chunk: int = 4096) -> np.ndarray:
        """(C, Q, 3, 3) d phi / d x at every cell's quadrature points (no point location needed)."""
        _, g = tensor_basis(self.quadrature, self.cell)  # (Q, 27, 3)
        out = np.empty((self.n_cells, len(self.quadrature), 3, 3))
        for start in range(0, self.n_cells, chunk):
            out[start : start + chunk] = np.einsum("qkd,cka->cqad", g, control[self.dofs[start : start + chunk]])
        return out

    def quadrature_points(self) -> np.ndarray:
        """(C * Q, 3) positions of the quadrature points, cell-major."""
        return (self.origin + (self.cells[:, None, :] + self.quadrature[None]) * self.cell).reshape(-1, 3)


def _virtual_nodes(cells: np.ndarray, shape: tuple, origin: np.ndarray, h: float):
    """Control points split by connected material within their support: (dofs (C, 27), rest (n, 3)).

    Control point k is used by cells k - 2 .. k per axis (a 3 x 3 x 3 block); its active cells in
    that block are labelled by 26-connectivity (cells touching at a corner count as joined, so a
    thin diagonal part is never torn) and each label becomes one degree of freedom.
    """
    shape = np.asarray(shape)
    kshape = tuple(shape + 2)
    padded = np.zeros(tuple(shape + 4), dtype=bool)
    padded[2 : shape[0] + 2, 2 : shape[1] + 2, 2 : shape[2] + 2][tuple(cells.T)] = True
    code = np.zeros(kshape, dtype=np.int64)
    for bit, (a, b, c) in enumerate(OFFSETS):  # bit <-> block position (a, b, c) = cell k - 2 + (a, b, c)
        code |= padded[a : a + kshape[0], b : b + kshape[1], c : c + kshape[2]].astype(np.int64) << bit
    flat_code = code.ravel()
    used = np.flatnonzero(flat_code)
    unique, inverse = np.unique(flat_code[used], return_inverse=True)
    labels = np.zeros((len(unique), 27), dtype=np.int64)
    pieces = np.zeros(len(unique), dtype=np.int64)
    structure = np.ones((3, 3, 3), dtype=bool)
    bits = np.arange(27)
    for u, value in enumerate(unique):
        mask = ((int(value) >> bits) & 1).astype(bool).reshape(3, 3, 3)
        lab, n = scipy.ndimage.label(mask, structure=structure)
        labels[u], pieces[u] = lab.ravel(), n
    count = np.zeros(len(flat_code), dtype=np.int64)
    count[used] = pieces[inverse]
    first = np.cumsum(count) - count
    table = np.zeros(len(flat_code), dtype=np.int64)  # row of `labels` per control point
    table[used] = inverse
    control = cells[:, None, :] + OFFSETS[None]  # (C, 27, 3): k = c + o
    block_bit = (2 - OFFSETS) @ np.array([9, 3, 1])  # the cell's position in k's block
    kflat = np.ravel_multi_index(tuple(control.reshape(-1, 3).T), kshape).reshape(len(cells), 27)
    dofs = first[kflat] + labels[table[kflat], block_bit[None, :]] - 1
    rest = np.zeros((int(count.sum()), 3))
    # quadratic B-splines reproduce x exactly when control point k sits at origin + (k - 1/2) h
    rest[dofs.ravel()] = origin + (control.reshape(-1, 3) - 0.5) * h
    return dofs, rest
