"""Narrow-band marching cubes against analytic area and volume."""

import numpy as np
import pytest
import torch
import trimesh

from isoclay.extract import decimate, extract_mesh
from isoclay.extract.marching import OFF_ZERO, dense_grid_values, grid_layout
from isoclay.field.analytic import SphereSDF, TorusSDF
from isoclay.mesh import make_mesh, measures


def test_sphere_area_and_volume():
    # Marching cubes (Lorensen & Cline 1987) inscribes the surface: area slightly below
    # 4 pi r^2 and within 1%; volume within 1% of 4/3 pi r^3 (sphere formulas, common practice).
    r = 0.4
    stats = {}
    m = extract_mesh(SphereSDF(r), [-r] * 3, [r] * 3, 96, stats=stats)
    area = measures.surface_area(m.vertices, m.faces)
    volume = measures.signed_volume(m.vertices, m.faces)
    assert area < 4 * np.pi * r**2
    np.testing.assert_allclose(area, 4 * np.pi * r**2, rtol=0.01)
    np.testing.assert_allclose(volume, 4 / 3 * np.pi * r**3, rtol=0.01)
    assert measures.is_watertight(m.faces)
    # outward orientation: face normals point away from the centre (trimesh's check too)
    tm = trimesh.Trimesh(m.vertices, m.faces, process=False)
    assert tm.is_winding_consistent and tm.is_watertight and tm.volume > 0
    # narrow band: at 96 cells the shell is under a tenth of the grid (measured 7.2%)
    assert stats["evaluations"] < 0.1 * stats["dense_nodes"]


def _off_zero(values, cell):
    """extract_mesh keeps node values OFF_ZERO cells away from zero; the dense reference does too."""
    tiny = np.float32(OFF_ZERO * cell)
    near = np.abs(values) < tiny
    values[near] = np.where(values[near] < 0, -tiny, tiny)
    return values


def test_torus_matches_dense_extraction():
    # The narrow band must give the same mesh as evaluating every node (scikit-image
    # marching_cubes on the dense grid is the reference).
    from skimage.measure import marching_cubes

    field = TorusSDF(0.3, 0.1)
    lo, hi = np.array([-0.42, -0.42, -0.12]), np.array([0.42, 0.42, 0.12])
    stats = {}
    m = extract_mesh(field, lo, hi, 64, stats=stats)
    origin, cell, cells = grid_layout(lo, hi, 64)
    dense = _off_zero(dense_grid_values(field, origin, cell, tuple(cells + 1)), cell)
    v, f, _, _ = marching_cubes(dense, 0.0, spacing=(cell,) * 3)
    assert len(f) == m.n_faces
    np.testing.assert_allclose(np.sort((v + origin).sum(1)), np.sort(m.vertices.sum(1)), atol=1e-6)
    # torus volume 2 pi^2 R r^2 (Pappus, common practice)
    np.testing.assert_allclose(measures.signed_volume(m.vertices, m.faces), 2 * np.pi**2 * 0.3 * 0.01, rtol=0.02)


class _SphereWithNeedle(torch.nn.Module):
    """A sphere with a needle about one grid cell thick sticking out of it (union by min).

    The needle's axis runs along odd nodes of the fine grid (y = z = one cell), which no
    coarser lattice holds.
    """

    def __init__(self, offset: float):
        super().__init__()
        self.offset = offset

    def forward(self, p):
        sphere = p.norm(dim=1) - 0.25
        radial = torch.sqrt((p[:, 1] - self.offset) ** 2 + (p[:, 2] - self.offset) ** 2 + 1e-12) - 0.005
        along = (p[:, 0] - 0.3).abs() - 0.15
        outside = torch.stack([radial.clamp(min=0), along.clamp(min=0)], dim=1).norm(dim=1)
        needle = outside + torch.minimum(torch.maximum(radial, along), torch.zeros_like(radial))
        return torch.minimum(sphere, needle)


def _dense_reference(field, lo, hi, resolution):
    """scikit-image marching_cubes on every node of the grid extract_mesh uses."""
    from skimage.measure import marching_cubes

    origin, cell, cells = grid_layout(lo, hi, resolution)
    dense = _off_zero(dense_grid_values(field, origin, cell, tuple(cells + 1)), cell)
    v, f, _, _ = marching_cubes(dense, 0.0, spacing=(cell,) * 3, allow_degenerate=False)
    return v + origin, f


def test_band_follows_surface_finer_than_the_coarse_lattices():
    # The needle is invisible to the coarser lattices; the last pass must follow it out of
    # the sphere so the mesh equals marching cubes on the dense grid (scikit-image
    # marching_cubes is the reference).
    lo, hi = np.array([-0.27, -0.27, -0.27]), np.array([0.47, 0.27, 0.27])
    field = _SphereWithNeedle(offset=0.74 / 80)  # one fine cell off the centre line
    m = extract_mesh(field, lo, hi, 80)
    v, f = _dense_reference(field, lo, hi, 80)
    assert len(f) == m.n_faces
    np.testing.assert_allclose(np.sort(v.sum(1)), np.sort(m.vertices.sum(1)), atol=1e-6)
    assert m.vertices[:, 0].max() > 0.43  # the needle's tip made it into the mesh


class _Diamond(torch.nn.Module):
    """|x| + |y| + |z| - 0.25: zero exactly at many grid nodes (not a distance, but a field)."""

    def forward(self, p):
        return p.abs().sum(dim=1) - 0.25


def test_values_at_zero_give_no_degenerate_triangles():
    # Exact zeros on the grid make marching cubes stack vertices on one spot (measured:
    # zero-area triangles here without extract_mesh's off-zero rule). The mesh must stay
    # watertight and outward with no zero-area triangle, its vertices on the surface
    # (|x| + |y| + |z| = 0.25, the field's own closed form).
    m = extract_mesh(_Diamond(), np.full(3, -0.25), np.full(3, 0.25), 40)
    assert measures.is_watertight(m.faces)
    assert not measures.has_degenerate_faces(m.vertices, m.faces)
    a = m.vertices[m.faces]
    assert np.linalg.norm(np.cross(a[:, 1] - a[:, 0], a[:, 2] - a[:, 0]), axis=1).min() > 0
    np.testing.assert_allclose(np.abs(m.vertices).sum(1), 0.25, atol=2e-3 * 0.5 / 40)
    # octahedron volume 4/3 a^3 for |x|+|y|+|z| <= a (common practice, no source)
    np.testing.assert_allclose(measures.signed_volume(m.vertices, m.faces), 4 / 3 * 0.25**3, rtol=0.01)


def test_surface_cut_by_the_box_is_closed_at_the_walls():
    # A sphere larger than the extraction box: the mesh is closed along the box's walls, so it
    # must be watertight and hold about the volume of the sphere's part inside the grid
    # (sphere volume 4/3 pi r^3 minus six caps pi h^2 (3r - h) / 3, common practice).
    r, half = 0.5, 0.45
    m = extract_mesh(SphereSDF(r), [-half] * 3, [half] * 3, 48)
    assert measures.is_watertight(m.faces)
    grid_half = np.abs(m.vertices).max()  # the walls sit where the grid ends
    h = r - grid_half
    expected = 4 / 3 * np.pi * r**3 - 6 * np.pi * h**2 * (3 * r - h) / 3
    np.testing.assert_allclose(measures.signed_volume(m.vertices, m.faces), expected, rtol=0.02)
    # a box deep inside the shape: only the walls make surface; the result is the closed box
    m = extract_mesh(SphereSDF(2.0), [-0.3] * 3, [0.3] * 3, 32)
    assert measures.is_watertight(m.faces)
    side = np.ptp(m.vertices, axis=0)
    np.testing.assert_allclose(measures.signed_volume(m.vertices, m.faces), np.prod(side), rtol=0.02)


def test_empty_box_is_a_clear_failure():
    from isoclay.errors import SolverFailure

    with pytest.raises(SolverFailure, match="no surface"):
        extract_mesh(SphereSDF(0.05, center=(0.5, 0.5, 0.5)), [-0.2] * 3, [0.2] * 3, 32)


def test_decimate_to_target():
    m = trimesh.creation.icosphere(4)
    out = decimate(make_mesh(m.vertices, m.faces), 500)
    assert out.n_faces <= 500
    # libigl decimate keeps the shape: volume within 5% of the input's and every vertex
    # within 2% of the unit radius (trimesh.creation.icosphere is the reference solid)
    np.testing.assert_allclose(measures.signed_volume(out.vertices, out.faces), m.volume, rtol=0.05)
    np.testing.assert_allclose(np.linalg.norm(out.vertices, axis=1), 1.0, atol=0.02)
    assert measures.is_watertight(out.faces)
