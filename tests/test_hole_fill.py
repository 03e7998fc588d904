"""Hole fills that continue the scanned surface (remesh hole_fill), against the analytic sphere and pymeshfix."""

import numpy as np
import pymeshfix
import pytest
import trimesh

from isoclay.bench.scans import open_cup
from isoclay.errors import InvalidInput
from isoclay.field.fit import FitConfig
from isoclay.mesh import measures
from isoclay.mesh.types import TriangleMesh
from isoclay.pipeline import run_edit
from isoclay.tasks import remesh

RADIUS = 0.5
HOLE = 0.08
CENTRES = np.array([[0, 0, 1], [1, 0, 0.2], [-0.3, 0.9, 0], [0, -1, -0.5]], float)
CENTRES = RADIUS * CENTRES / np.linalg.norm(CENTRES, axis=1, keepdims=True)


def _holed_sphere() -> TriangleMesh:
    """An icosphere of radius 0.5 (trimesh.creation.icosphere) with four round holes of radius 0.08."""
    s = trimesh.creation.icosphere(subdivisions=5, radius=RADIUS)
    v, f = np.asarray(s.vertices), np.asarray(s.faces)
    removed = (np.linalg.norm(v[f].mean(axis=1)[:, None] - CENTRES[None], axis=2) < HOLE).any(axis=1)
    used = np.unique(f[~removed])
    remap = np.full(len(v), -1)
    remap[used] = np.arange(len(used))
    return TriangleMesh(v[used], remap[f[~removed]])


def _fill_error(mesh: TriangleMesh) -> float:
    """Mean distance to the analytic sphere of the surface over the holes (area samples by
    trimesh.sample.sample_surface whose radial projection lies within 0.07 of a hole's centre)."""
    pts, _ = trimesh.sample.sample_surface(trimesh.Trimesh(mesh.vertices, mesh.faces, process=False), 50_000, seed=1)
    on_sphere = RADIUS * pts / np.linalg.norm(pts, axis=1, keepdims=True)
    over = (np.linalg.norm(on_sphere[:, None] - CENTRES[None], axis=2) < HOLE - 0.01).any(axis=1)
    assert over.sum() > 500
    return float(np.abs(np.linalg.norm(pts[over], axis=1) - RADIUS).mean())


def test_small_holes_continue_the_sphere_closer_than_pymeshfix():
    # A sphere scan with four holes (radius 0.08 on a sphere of radius 0.5): the rebuilt surface
    # over each hole lies closer to the analytic sphere than MeshFix's fill (pymeshfix, Attene 2010)
    # and than our flat membrane (which sits up to the cap's sagitta, R - sqrt(R^2 - r^2) = 0.0064,
    # inside). Measured: continued 0.00009, pymeshfix 0.0029, flat 0.0048 mean distance (before
    # the two rings beside the fill were faired with it, continued was 0.0015).
    scan = _holed_sphere()
    fit = FitConfig(resolution=128)
    smooth = run_edit(scan, "remesh", {"resolution": 128}, fit_config=fit)
    flat = run_edit(scan, "remesh", {"resolution": 128, "hole_fill": "flat"}, fit_config=fit)
    fix = pymeshfix.MeshFix(scan.vertices, scan.faces)
    fix.repair()
    theirs = _fill_error(TriangleMesh(np.asarray(fix.points), np.asarray(fix.faces)))
    ours = _fill_error(smooth.mesh)
    assert smooth.report["holes_continued"] == 4 and "holes_filled" not in flat.report
    assert ours <= 0.5 * theirs, (ours, theirs)
    assert ours <= 0.1 * _fill_error(flat.mesh)
    assert smooth.report["watertight"] and measures.is_watertight(smooth.mesh.faces)


def test_a_wide_opening_keeps_its_lid_unless_asked():
    # The open cup (a sphere of radius 0.5 cut at 0.25): its mouth spans 0.87 of the sphere's
    # size, more than a missed patch, so "auto" closes it flat with the volume of the sphere minus
    # its cap, V = 4/3 pi R^3 - pi h^2 (3R - h) / 3 (handbook formulas), within 5%; "smooth"
    # continues the walls over it and holds more.
    cup, h = open_cup()
    expected = 4 / 3 * np.pi * RADIUS**3 - np.pi * h * h * (3 * RADIUS - h) / 3
    fit = FitConfig(resolution=96)
    auto = run_edit(cup, "remesh", {"resolution": 96}, fit_config=fit)
    domed = run_edit(cup, "remesh", {"resolution": 96, "hole_fill": "smooth"}, fit_config=fit)
    volume = measures.signed_volume(auto.mesh.vertices, auto.mesh.faces)
    np.testing.assert_allclose(volume, expected, rtol=0.05)
    assert auto.report["holes_continued"] == 0
    assert measures.signed_volume(domed.mesh.vertices, domed.mesh.faces) > 1.05 * volume


@pytest.mark.parametrize("value", ["round", 3, None, True])
def test_unknown_hole_fill_is_refused(value):
    with pytest.raises(InvalidInput, match="hole_fill .* unknown: use auto, smooth or flat"):
        remesh.Config.from_params({"hole_fill": value})
