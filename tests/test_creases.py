"""Crease restoration on extracted meshes: sharp edges come back, curved surfaces stay as they are."""

from __future__ import annotations

import numpy as np
import torch

from isoclay.extract import extract_mesh
from isoclay.extract.creases import restore_creases
from isoclay.field.analytic import RoundedBoxSDF, SphereSDF, TorusSDF
from isoclay.field.spline import spline_from_distances
from isoclay.mesh import measures
from isoclay.tasks.base import face_normals

torch.set_num_threads(1)

HALF = np.array([0.3, 0.22, 0.16])


def _rounded_by_the_grid(resolution=96):
    """A box whose field is sampled on a coarse spline grid, so its edges come out rounded
    over about a grid cell, as any fitted field does; returns (mesh, grid cell)."""
    from isoclay.field.spline import SplineSDF

    exact = RoundedBoxSDF(tuple(HALF), 0.0)
    axis = SplineSDF(resolution).node_positions()
    nodes = np.stack(np.meshgrid(axis, axis, axis, indexing="ij"), axis=-1).reshape(-1, 3)
    with torch.no_grad():
        values = exact(torch.as_tensor(nodes, dtype=torch.float32)).numpy().reshape((len(axis),) * 3)
    field = spline_from_distances(values)
    return extract_mesh(field, -HALF - 0.02, HALF + 0.02, 128), field.cell


def _box_normal_error(mesh):
    """Mean angle (deg) between each face's normal and the box's exact normal at the nearest
    face of the box (the box's faces are planes: common practice), split by distance to an edge."""
    n = face_normals(mesh.vertices, mesh.faces)
    c = mesh.vertices[mesh.faces].mean(axis=1)
    gap = HALF - np.abs(c)  # distance to each pair of opposite faces
    axis = gap.argmin(axis=1)
    exact = np.zeros_like(n)
    exact[np.arange(len(c)), axis] = np.sign(c[np.arange(len(c)), axis])
    angle = np.degrees(np.arccos(np.clip((n * exact).sum(1), -1, 1)))
    second = np.sort(gap, axis=1)[:, 1]  # distance to the nearest edge
    near_edge = second < 0.02
    return angle[near_edge].mean(), angle[~near_edge].mean()


def test_grid_rounded_box_gets_its_edges_back():
    mesh, cell = _rounded_by_the_grid()
    edge_before, flat_before = _box_normal_error(mesh)
    out, report = restore_creases(mesh, 3.5 * cell)
    edge_after, flat_after = _box_normal_error(out)
    assert report.faces_guided > 0
    assert edge_after < 0.6 * edge_before, (edge_before, edge_after)
    assert flat_after < flat_before + 0.2
    # the box's volume comes back toward the exact 8 abc (rounding removed material)
    exact = 8 * np.prod(HALF)
    assert abs(measures.signed_volume(out.vertices, out.faces) - exact) < abs(measures.signed_volume(mesh.vertices, mesh.faces) - exact)
    # same faces, still closed, no triangle turned over or squashed to nothing
    assert np.array_equal(out.faces, mesh.faces) and measures.is_watertight(out.faces)
    before, after = face_normals(mesh.vertices, mesh.faces), face_normals(out.vertices, out.faces)
    assert ((before * after).sum(1) > 0).all()


def test_smooth_curved_surfaces_are_left_alone():
    # A torus with a thin tube and a sphere have no creases anywhere (curvature formulas, do
    # Carmo 1976): nothing may move, or the restoration would facet them.
    for field, lo, hi in (
        (TorusSDF(0.3, 0.03), np.array([-0.34, -0.34, -0.04]), np.array([0.34, 0.34, 0.04])),
        (SphereSDF(0.1), np.full(3, -0.11), np.full(3, 0.11)),
    ):
        mesh = extract_mesh(field, lo, hi, 128)
        out, report = restore_creases(mesh, 3.5 * 1.3 / 128)
        assert report.faces_guided == 0
        assert np.array_equal(out.vertices, mesh.vertices)
