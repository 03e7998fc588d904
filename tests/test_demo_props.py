"""The committed workshop props pass isoclay's mesh intake, with the warnings each one is meant to raise.

Run: PYTHONPATH=solver .venv/bin/python -m pytest -q tests/test_demo_props.py
The props come from demo_blends/make_workshop.py (Blender environment); regenerate them with
`.venv-blender/bin/python demo_blends/make_workshop.py --out demo_blends` when this fails after a change.
Outside references: trimesh (watertightness, face-adjacency loose parts, volume), libigl (point-to-mesh distance).
"""

from __future__ import annotations

import importlib.util
import json
from pathlib import Path

import igl
import numpy as np
import pytest
import trimesh

from isoclay.errors import InvalidMesh
from isoclay.mesh import TriangleMesh, read_mesh, validate_mesh, write_mesh

DEMO = Path(__file__).resolve().parents[1] / "demo_blends"
PROPS = ("jug", "lantern", "hook", "stone", "anvil")


@pytest.fixture(scope="module", params=PROPS)
def prop(request):
    path = DEMO / f"{request.param}.ply"
    assert path.is_file(), f"{path} missing: run demo_blends/make_workshop.py in the Blender environment"
    return request.param, read_mesh(path), trimesh.load(path, process=False)


def test_every_prop_passes_the_validator(prop):
    name, mesh, ref = prop
    check = validate_mesh(mesh, name)
    # nothing had to be repaired: no dropped faces, no inverted parts, no duplicate points
    assert check.flipped_components == 0 and check.duplicate_vertices == 0 and check.nonmanifold_edges == 0
    assert len(check.mesh.faces) == len(mesh.faces)
    # open boundary edges agree with trimesh: edges used by one face (trimesh.grouping.group_rows)
    ref_open = len(trimesh.grouping.group_rows(ref.edges_sorted, require_count=1))
    assert check.boundary_edges == ref_open
    # loose parts agree with trimesh's face-adjacency split (parts here never touch at a lone vertex)
    assert check.components == len(ref.split(only_watertight=False))
    warned_open = any("open boundary" in w for w in check.warnings)
    warned_parts = any("loose parts" in w for w in check.warnings)
    if name == "stone":  # scanned with an open underside
        assert warned_open and check.boundary_edges > 20 and not ref.is_watertight
    else:
        assert not warned_open and ref.is_watertight
    if name in ("lantern", "jug"):  # lantern: frame, glass, ring; jug: body and handle
        assert warned_parts and check.components >= (3 if name == "lantern" else 2)
    else:
        assert not warned_parts and check.components == 1
    # closed parts face outward: positive enclosed volume per trimesh (Trimesh.volume, divergence theorem)
    if name != "stone":
        assert all(part.volume > 0 for part in ref.split(only_watertight=False))


@pytest.mark.parametrize("name", ["hook", "lantern"])
def test_handle_files_sit_on_their_props(name):
    data = json.loads((DEMO / f"{name}_handles.json").read_text())
    handles, targets = np.array(data["handles"], dtype=float), np.array(data["targets"], dtype=float)
    assert handles.ndim == 2 and handles.shape[1] == 3 and handles.shape == targets.shape
    ref = trimesh.load(DEMO / f"{name}.ply", process=False)
    # distance to the surface by libigl's point_mesh_squared_distance: on it to 1e-6 m (float32 file)
    sq, _, _ = igl.point_mesh_squared_distance(handles, np.asarray(ref.vertices, float), np.asarray(ref.faces, np.int64))
    assert np.sqrt(sq).max() < 1e-6
    held = (handles == targets).all(axis=1)
    assert 3 <= held.sum() < len(handles)  # some held still, some pulled
    diag = float(np.linalg.norm(ref.bounds[1] - ref.bounds[0]))
    shift = np.linalg.norm(targets[~held] - handles[~held], axis=1)
    # visible but plausible: 5% to 40% of the prop's size (common practice, no source)
    assert 0.05 * diag <= shift.min() and shift.max() <= 0.4 * diag


def test_demo_edit_list_names_existing_inputs():
    edits = json.loads((DEMO / "demo_edits.json").read_text())
    assert {e["prop"]: e["task"] for e in edits} == {"hook": "deform", "lantern": "deform", "stone": "smooth", "anvil": "sharpen"}
    for e in edits:
        assert (DEMO / e["mesh"]).is_file()
        if e["task"] == "deform":
            assert (DEMO / e["handles"]).is_file()
    stone = next(e for e in edits if e["task"] == "smooth")
    diag = float(np.linalg.norm(np.ptp(read_mesh(DEMO / "stone.ply").vertices, axis=0)))
    assert 0.01 * diag < stone["strength"] < 0.2 * diag  # bumps, not the whole stone
    assert 0.0 < next(e for e in edits if e["task"] == "sharpen")["amount"] <= 1.0


def test_a_broken_copy_of_a_prop_is_refused():
    """The validator refuses a prop with a face pointing past the last vertex or a NaN corner."""
    mesh = read_mesh(DEMO / "hook.ply")
    faces = mesh.faces.copy()
    faces[7, 1] = mesh.n_vertices + 3
    with pytest.raises(InvalidMesh, match="outside"):
        validate_mesh(TriangleMesh(mesh.vertices, faces, {}, None), "hook")
    verts = mesh.vertices.copy()
    verts[11, 2] = np.nan
    with pytest.raises(InvalidMesh, match="NaN"):
        validate_mesh(TriangleMesh(verts, mesh.faces, {}, None), "hook")


def _render_reader():
    """demo_blends/render_views.py's PLY reader (numpy only; bpy is imported only when rendering)."""
    spec = importlib.util.spec_from_file_location("render_views_reader", DEMO / "render_views.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_render_step_reads_what_the_solver_writes(tmp_path):
    """Distortion values written by isoclay.mesh.write_mesh (trimesh's PLY writer) reach the render step."""
    reader = _render_reader()
    mesh = read_mesh(DEMO / "hook.ply")
    rng = np.random.default_rng(7)
    stretch, bend = rng.random(mesh.n_vertices), rng.random(mesh.n_vertices)
    write_mesh(tmp_path / "after.ply", mesh.with_vertices(mesh.vertices + 0.01, stretch=stretch, bend=bend))
    got = reader.read_ply(tmp_path / "after.ply")
    ref = trimesh.load(tmp_path / "after.ply", process=False)
    np.testing.assert_allclose(got.vertices, ref.vertices, rtol=0, atol=0)  # same float32 values as trimesh reads
    np.testing.assert_array_equal(got.faces, ref.faces)
    np.testing.assert_allclose(got.values["stretch"], stretch, atol=1e-7)  # stored as float32
    np.testing.assert_allclose(got.values["bend"], bend, atol=1e-7)


def test_render_step_reader_splits_polygons_like_trimesh(tmp_path):
    """An ASCII PLY with a quad and a triangle: fan triangulation gives trimesh's triangles."""
    reader = _render_reader()
    path = tmp_path / "quad.ply"
    path.write_text(
        "ply\nformat ascii 1.0\nelement vertex 5\nproperty float x\nproperty float y\nproperty float z\n"
        "element face 2\nproperty list uchar int vertex_indices\nend_header\n"
        "0 0 0\n1 0 0\n1 1 0\n0 1 0\n0.5 0.5 1\n4 0 1 2 3\n3 0 1 4\n"
    )
    got = reader.read_ply(path)
    ref = trimesh.load(path, process=False)
    assert len(got.faces) == len(ref.faces) == 3
    np.testing.assert_allclose(got.vertices, ref.vertices)
    # same triangles up to order (trimesh.triangles: corner coordinates)
    key = lambda tris: sorted(map(tuple, np.sort(tris.reshape(-1, 9), axis=1).round(6)))  # noqa: E731
    assert key(got.vertices[got.faces]) == key(np.asarray(ref.triangles))
    with pytest.raises(reader.BadInput, match="vertex 7"):
        path.write_text(path.read_text().replace("3 0 1 4", "3 0 1 7"))
        reader.read_ply(path)


@pytest.mark.parametrize("mixed", [False, True])
def test_render_step_reader_reads_binary_polygons_like_trimesh(tmp_path, mixed):
    """A binary cube of six quads (vectorised path), or with one quad split in two (mixed sizes, slow path)."""
    reader = _render_reader()
    v = np.array([[x, y, z] for x in (0, 1) for y in (0, 1) for z in (0, 1)], dtype="<f4")
    quads = [[0, 1, 3, 2], [4, 6, 7, 5], [0, 4, 5, 1], [2, 3, 7, 6], [0, 2, 6, 4], [1, 5, 7, 3]]
    polys = quads[:-1] + [[1, 5, 7], [1, 7, 3]] if mixed else quads
    body = b"".join(np.uint8(len(p)).tobytes() + np.array(p, dtype="<i4").tobytes() for p in polys)
    header = (
        "ply\nformat binary_little_endian 1.0\nelement vertex 8\nproperty float x\nproperty float y\nproperty float z\n"
        f"element face {len(polys)}\nproperty list uchar int vertex_indices\nend_header\n"
    )
    path = tmp_path / "cube.ply"
    path.write_bytes(header.encode() + v.tobytes() + body)
    got = reader.read_ply(path)
    assert len(got.faces) == 12
    if not mixed:  # trimesh reads binary lists of one size only
        ref = trimesh.load(path, process=False)
        np.testing.assert_array_equal(np.sort(np.sort(got.faces, axis=1), axis=0), np.sort(np.sort(ref.faces, axis=1), axis=0))
    # the triangles close the unit cube, facing out: volume 1 by the divergence theorem
    # (trimesh.Trimesh.volume), watertight (trimesh.Trimesh.is_watertight); tolerance 1e-12
    cube = trimesh.Trimesh(got.vertices, got.faces, process=False)
    assert cube.is_watertight and cube.is_winding_consistent
    np.testing.assert_allclose(abs(cube.volume), 1.0, atol=1e-12)
    path.write_bytes(header.encode() + v.tobytes() + body[:-5])  # cut inside the last face
    with pytest.raises(reader.BadInput, match="truncated|readable"):
        reader.read_ply(path)
