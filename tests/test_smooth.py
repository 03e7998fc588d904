"""Feature-aware smoothing: parameters, noisy-solid quality against trimesh filters, keep-topology, CLI."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from isoclay.bench import smooth as bench
from isoclay.errors import InvalidInput
from isoclay.field.analytic import SphereSDF
from isoclay.mesh import Normalization, measures
from isoclay.mesh.types import TriangleMesh
from isoclay.tasks import smooth
from isoclay.callbacks import never_stop, no_progress
from isoclay.tasks.base import face_normals

torch.set_num_threads(1)

UNIT = Normalization((0.0, 0.0, 0.0), 1.0)
MM = Normalization((0.0, 0.0, 0.0), 1.0 / 40.0)  # an object 40 mm long


@pytest.mark.parametrize(
    "params, words",
    [
        ({}, "strength is missing"),
        ({"strength": -1.0}, "positive length"),
        ({"strength": 0}, "positive length"),
        ({"strength": float("nan")}, "positive length"),
        ({"strength": "big"}, "positive length"),
        ({"strength": True}, "positive length"),
        ({"strength": 20.0}, "too large"),
        ({"strength": 1.0, "preserve_volume": "yes"}, "true or false"),
        ({"strength": 1.0, "keep_topology": 1}, "true or false"),
        ({"strength": 1.0, "crisp_creases": "no"}, "true or false"),
        ({"strength": 1.0, "creases": "sharp"}, "use auto, crisp or soft"),
        ({"strength": 1.0, "creases": "soft", "crisp_creases": True}, "contradicts"),
        ({"strength": 1.0, "closed": "no"}, "true or false"),
        ({"strength": 1.0, "resolution": 4}, "out of range"),
        ({"strength": 1.0, "resolution": 10**15}, "out of range"),
        ({"strength": 1e300}, "too large"),
        ({"strength": 1.0, "sigma": 2}, "unknown parameter"),
    ],
)
def test_bad_parameters_are_refused_with_one_line(params, words):
    with pytest.raises(InvalidInput) as err:
        smooth.Config.from_params(params, MM)
    message = str(err.value)
    assert words in message
    assert "\n" not in message and "e+" not in message and len(message) < 200  # no absurd numbers echoed


def test_strength_is_a_length_in_the_mesh_units():
    config = smooth.Config.from_params({"strength": 2.0}, MM)  # 2 mm on a 40 mm object
    np.testing.assert_allclose(config.strength, 0.05)
    assert config.preserve_volume and not config.keep_topology and not config.closed
    assert config.creases == "auto" and config.resolution is None
    # the older crisp_creases flag still means "crisp"
    assert smooth.Config.from_params({"strength": 2.0, "crisp_creases": True}, MM).creases == "crisp"


def _sphere_mesh(radius=0.4, subdivisions=4):
    import trimesh

    s = trimesh.creation.icosphere(subdivisions=subdivisions, radius=radius)
    return TriangleMesh(np.asarray(s.vertices, dtype=np.float64), np.asarray(s.faces, dtype=np.int64))


@pytest.fixture(scope="module")
def noisy_block():
    """A chamfered block (~9k vertices, 0.3% diagonal noise along normals), its exact clean
    polytope, creases, and a field fitted to the noisy mesh (exact distances at a 96 grid)."""
    from isoclay.field.fit import FitConfig, fit_field

    clean, creases = bench.block_mesh_exact()
    noisy = bench.block_scan(60, 0.003, seed=3)
    field = fit_field(noisy, FitConfig(resolution=96, steps=0)).field
    return clean, creases, noisy, field


def test_noisy_hard_surface_block_at_default_settings_beats_the_mesh_filters(noisy_block):
    # References: pymeshlab's two-step smoothing (Belyaev & Ohtake 2003, "A comparison of mesh
    # smoothing methods") and Taubin smoothing (Taubin 1995, "A signal processing approach to fair
    # surface design"), trimesh's filter_laplacian and filter_taubin, each at its best setting of
    # a sweep, scored against the exact clean block. Default settings (creases "auto", no option):
    # feature-region normal error <= 0.8 x the best filter's (issue 12; measured 7.0 against 12.4
    # deg), Chamfer within 10% of the best filter's, volume within 0.5%, closed, and the data
    # recognised as a hard surface.
    clean, creases, noisy, field = noisy_block
    result = smooth.run(field, noisy, smooth.Config(strength=0.05), no_progress, never_stop)
    ours = bench.score(result.mesh, clean, creases)
    feature, chamfer = [], []
    for name in ("pymeshlab_two_step", "pymeshlab_taubin", "trimesh_laplacian", "trimesh_taubin"):
        for value in bench.BASELINE_SWEEPS[name][1]:
            s = bench.score(bench.run_baseline(name, value, noisy), clean, creases)
            feature.append(s["normal_error_feature_deg"])
            chamfer.append(s["chamfer_rel"])
    assert ours["normal_error_feature_deg"] <= 0.8 * min(feature), (ours, min(feature))
    assert ours["chamfer_rel"] <= 1.10 * min(chamfer)
    assert abs(result.metrics["volume_change"]) < 5e-3
    assert measures.is_watertight(result.mesh.faces)
    assert result.metrics["hard_surface"] == 1.0 and result.metrics["crease_faces"] > 0
    assert ours["normal_error_flat_deg"] < 0.25 * bench.score(noisy, clean, creases)["normal_error_flat_deg"]


def _noisy_sphere(subdivisions=4, radius=0.5, share=0.3, seed=0):
    """Icosphere with Gaussian noise along the normals of share x its edge length; returns (mesh, spacing)."""
    clean = _sphere_mesh(radius, subdivisions)
    e = clean.vertices[clean.faces]
    spacing = float(np.median(np.linalg.norm(e[:, 1] - e[:, 0], axis=1)))
    return bench.add_normal_noise(clean, share * spacing, seed), spacing


def test_noisy_sphere_loses_its_noise_and_keeps_its_volume():
    # Analytic sphere (radius 0.5): noise along the normals at the vertex spacing, smoothed at
    # strength 2 x the spacing with default settings: radial deviation (rms) <= 0.25 x the input's
    # (issue 12; measured 0.21 for this seed, 0.19-0.22 over four seeds), volume within 0.5% of the input's, no crease restored on an
    # organic surface (no needle triangles), output about the input's size.
    from isoclay.field.fit import FitConfig, fit_field

    noisy, spacing = _noisy_sphere()
    field = fit_field(noisy, FitConfig(resolution=96)).field
    result = smooth.run(field, noisy, smooth.Config(strength=2 * spacing), no_progress, never_stop)
    before = np.sqrt(((np.linalg.norm(noisy.vertices, axis=1) - 0.5) ** 2).mean())
    after = np.sqrt(((np.linalg.norm(result.mesh.vertices, axis=1) - 0.5) ** 2).mean())
    assert after <= 0.25 * before, (before, after)
    assert abs(result.metrics["volume_change"]) < 5e-3
    assert result.metrics["hard_surface"] == 0.0 and "crease_faces" not in result.metrics
    assert result.mesh.n_faces <= 1.5 * max(noisy.n_faces, 2000)


def test_open_scan_comes_back_open_and_true_at_the_rim():
    # A noisy sphere with its bottom quarter removed (z < -0.25: an open scan). The winding-number
    # field closes the hole; the result must not: it keeps an open rim where the scan had one
    # (boundary edges), no face lies below the cut, and the normal error near the rim (within 0.1
    # of the cut) stays within 1.5 x the interior's (issue 12), against the analytic sphere's
    # radial normals. Measured 2.5 against 2.1 deg, 1.2 x; 1.05-1.39 x over seeds 0-3. The fitted
    # field bends toward its cap at the rim: held as the fit left it the rim was 4.7-5.9 x, with
    # the nearest triangle's plane continued over the cap 2.0-2.7 x; before this work the rim was
    # capped, 46 deg. closed=True gives the closed surface instead.
    from isoclay.extract.footprint import boundary_edge_count
    from isoclay.field.fit import FitConfig, fit_field

    noisy, spacing = _noisy_sphere(seed=2)
    keep = noisy.vertices[noisy.faces].mean(axis=1)[:, 2] > -0.25
    used = np.unique(noisy.faces[keep])
    remap = np.full(noisy.n_vertices, -1)
    remap[used] = np.arange(len(used))
    scan = TriangleMesh(noisy.vertices[used], remap[noisy.faces[keep]])
    field = fit_field(scan, FitConfig(resolution=96)).field
    result = smooth.run(field, scan, smooth.Config(strength=2 * spacing), no_progress, never_stop)
    out = result.mesh
    assert boundary_edge_count(out.faces) > 0
    centres = out.vertices[out.faces].mean(axis=1)
    assert centres[:, 2].min() > -0.25 - 2 * spacing
    n = face_normals(out.vertices, out.faces)
    error = np.degrees(np.arccos(np.clip((n * centres / np.linalg.norm(centres, axis=1, keepdims=True)).sum(1), -1, 1)))
    rim = centres[:, 2] < -0.15
    assert error[rim].mean() <= 1.5 * error[~rim].mean(), (error[rim].mean(), error[~rim].mean())
    closed = smooth.run(field, scan, smooth.Config(strength=2 * spacing, closed=True), no_progress, never_stop)
    assert measures.is_watertight(closed.mesh.faces)


def test_keep_topology_moves_vertices_onto_the_new_surface(noisy_block):
    # Projection x - f grad f / |grad f|^2 (common practice, no source): every vertex ends on the
    # new level set (|f| < 1e-4), faces unchanged, "moved" = distance travelled (checked against
    # the positions), and the noise's size bounds the motion (3 sigma of 0.3% diagonal ~ 1.5e-2).
    from isoclay.geometry import values

    _, _, noisy, field = noisy_block
    config = smooth.Config(strength=0.05, keep_topology=True)
    result = smooth.run(field, noisy, config, no_progress, never_stop)
    out = result.mesh
    np.testing.assert_array_equal(out.faces, noisy.faces)
    assert np.abs(values(result.field, out.vertices)).max() < 1e-4
    np.testing.assert_allclose(out.vertex_values["moved"], np.linalg.norm(out.vertices - noisy.vertices, axis=1), atol=1e-6)
    assert out.vertex_values["moved"].max() < 0.02


def test_keep_topology_refuses_a_change_too_large_to_project():
    # A sphere mesh of radius 0.4 projected onto a field whose surface is a sphere of radius 0.2:
    # every vertex would travel 0.2 (limit MAX_PROJECTION_MOVE), so the task must refuse.
    mesh = _sphere_mesh(0.4, 2)
    with pytest.raises(InvalidInput) as err:
        smooth.project_vertices(SphereSDF(0.2), mesh, "smooth")
    assert "--keep-topology" in str(err.value) and "\n" not in str(err.value)


def test_smoothing_leaves_a_clean_sphere_alone_and_keeps_volume():
    # A sphere much larger than the strength has no bumps to remove: its target normals are its
    # own, so the flow toward them (Tasdizen et al. 2002) leaves it in place, with or without
    # volume preservation; the extracted volume stays within 0.5% of 4/3 pi r^3 (issue 4 target,
    # analytic volume; marching cubes at 64 cells loses ~0.3% here).
    from isoclay.energies.curvature_flow import node_grid_of, spline_of

    field = spline_of(node_grid_of(SphereSDF(0.4), 48))
    mesh = _sphere_mesh(0.4, 3)
    exact = 4.0 / 3.0 * np.pi * 0.4**3
    for preserve in (True, False):
        result = smooth.run(field, mesh, smooth.Config(strength=0.08, preserve_volume=preserve, resolution=64, creases="soft"),
                            no_progress, never_stop)
        volume = measures.signed_volume(result.mesh.vertices, result.mesh.faces)
        assert abs(volume / exact - 1) < 5e-3
        r = np.linalg.norm(result.mesh.vertices, axis=1)
        np.testing.assert_allclose(r, 0.4, atol=2e-3)


def test_cli_smooth_writes_a_mesh_and_a_report(tmp_path):
    import json

    from isoclay.cli import main
    from isoclay.mesh import read_mesh, write_mesh

    src = tmp_path / "stone.ply"
    sphere = _sphere_mesh(0.4, 3)
    write_mesh(src, TriangleMesh(sphere.vertices * 50.0, sphere.faces))  # 40 units across
    out, report = tmp_path / "out.ply", tmp_path / "r.json"
    code = main(["--quiet", "smooth", str(src), "--strength", "2", "--out", str(out), "--report", str(report),
                 "--field-resolution", "32", "--fit-steps", "0", "--resolution", "48"])
    assert code == 0
    r = json.loads(report.read_text())
    assert r["task"] == "smooth" and r["watertight"] is True
    assert abs(r["volume_change"]) < 0.02
    assert read_mesh(out).n_faces == r["faces"]
    assert "crease_faces" not in r  # crease restoration is off unless asked for


def test_cli_crisp_creases_reaches_the_task_and_leaves_a_sphere_alone(tmp_path):
    # A sphere has no crease (common practice): --creases crisp must run and move nothing,
    # and its figures land in the report in the mesh's units.
    import json

    from isoclay.cli import main
    from isoclay.mesh import write_mesh

    src = tmp_path / "ball.ply"
    sphere = _sphere_mesh(0.4, 3)
    write_mesh(src, TriangleMesh(sphere.vertices * 50.0, sphere.faces))
    report = tmp_path / "r.json"
    code = main(["--quiet", "smooth", str(src), "--strength", "2", "--creases", "crisp", "--out", str(tmp_path / "o.ply"),
                 "--report", str(report), "--field-resolution", "32", "--fit-steps", "0", "--resolution", "48"])
    assert code == 0
    r = json.loads(report.read_text())
    assert r["crease_faces"] == 0 and r["crease_largest_move"] == 0.0


def test_cli_smooth_bad_strength_is_one_line_exit_2(tmp_path, capsys):
    from isoclay.cli import main
    from isoclay.mesh import write_mesh

    src = tmp_path / "stone.ply"
    write_mesh(src, _sphere_mesh(0.4, 1))
    code = main(["--quiet", "smooth", str(src), "--strength", "-3", "--out", str(tmp_path / "o.ply")])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert "strength" in err and len(err.splitlines()) == 1
    assert not (tmp_path / "o.ply").exists()
