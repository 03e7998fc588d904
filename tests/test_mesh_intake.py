"""Mesh intake: formats, validation errors and warnings, normalisation round trip."""

import numpy as np
import pytest
import trimesh

from isoclay.errors import InvalidInput, InvalidMesh
from isoclay.mesh import Normalization, make_mesh, read_mesh, validate_mesh, write_mesh
from isoclay.mesh import measures
from isoclay.mesh.io import read_vertex_values


def box():
    m = trimesh.creation.box(extents=(2.0, 1.0, 0.5))
    return make_mesh(m.vertices, m.faces)


@pytest.mark.parametrize("suffix", [".ply", ".obj", ".stl", ".glb"])
def test_formats_round_trip(tmp_path, suffix):
    # Reference: trimesh.creation.box; its volume 2 x 1 x 0.5 = 1 (box volume, common practice, no source)
    mesh = box()
    path = tmp_path / f"b{suffix}"
    write_mesh(path, mesh)
    back = read_mesh(path)
    back_clean = validate_mesh(back).mesh
    np.testing.assert_allclose(measures.signed_volume(back_clean.vertices, back_clean.faces), 1.0, rtol=1e-6)


def test_ply_carries_vertex_values(tmp_path):
    mesh = box()
    values = np.linspace(0, 1, mesh.n_vertices).astype(np.float32)
    write_mesh(tmp_path / "v.ply", mesh.with_vertices(mesh.vertices, stretch=values))
    np.testing.assert_allclose(read_vertex_values(tmp_path / "v.ply")["stretch"], values)


BAD = {
    "no vertices": (np.zeros((0, 3)), np.zeros((0, 3), int), "no vertices"),
    "no faces": (np.eye(3), np.zeros((0, 3), int), "no faces"),
    "nan": (np.array([[0, 0, 0], [1, 0, 0], [np.nan, 1, 0]]), np.array([[0, 1, 2]]), "NaN"),
    "inf": (np.array([[0, 0, 0], [1, 0, 0], [np.inf, 1, 0]]), np.array([[0, 1, 2]]), "NaN or infinite"),
    "index": (np.eye(3), np.array([[0, 1, 7]]), "face index 7"),
    "negative index": (np.eye(3), np.array([[0, 1, -1]]), "face index -1"),
    "degenerate": (np.array([[0, 0, 0], [1, 0, 0], [2, 0, 0]]), np.array([[0, 1, 2], [0, 0, 1]]), "degenerate"),
    "tiny": (np.eye(3) * 1e-9, np.array([[0, 1, 2]]), "absurd size"),
    "huge": (np.eye(3) * 1e9, np.array([[0, 1, 2]]), "absurd size"),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_meshes_get_one_line_errors(case):
    v, f, words = BAD[case]
    with pytest.raises(InvalidMesh) as info:
        validate_mesh(make_mesh(v, f))
    message = str(info.value)
    assert words in message and "\n" not in message


def test_scan_defects_are_repaired_with_warnings():
    # an open box (top removed), a second loose part with inverted normals, a duplicate vertex
    a = trimesh.creation.box()
    keep = a.face_normals[:, 2] < 0.5
    open_box = make_mesh(a.vertices, a.faces[keep])
    b = trimesh.creation.icosphere(2, radius=0.3)
    v = np.concatenate([open_box.vertices, b.vertices + [2.0, 0, 0], open_box.vertices[:1]])
    f = np.concatenate([open_box.faces, b.faces[:, ::-1] + len(open_box.vertices)])
    check = validate_mesh(make_mesh(v, f))
    text = " | ".join(check.warnings)
    assert check.boundary_edges == 4 and "open boundary" in text
    assert check.components == 2 and "loose parts" in text
    assert check.flipped_components == 1 and "flipped" in text
    assert check.duplicate_vertices == 0  # the extra copy is unused by any face
    # the flipped sphere now encloses a positive volume (icosphere volume, trimesh)
    sphere_faces = check.mesh.faces[len(open_box.faces):]
    np.testing.assert_allclose(measures.signed_volume(check.mesh.vertices, sphere_faces), b.volume, rtol=1e-9)


def test_nonmanifold_and_duplicates_warn():
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, -1, 0], [0, 0, 1], [1, 0, 0]], float)
    f = np.array([[0, 1, 2], [1, 0, 3], [0, 1, 4], [0, 5, 2]])
    check = validate_mesh(make_mesh(v, f))
    assert check.nonmanifold_edges == 1
    assert check.duplicate_vertices == 1


def test_normalization_round_trip_exact():
    rng = np.random.default_rng(3)
    pts = rng.normal(size=(1000, 3)) * 37.0 + [1e3, -5e2, 7.0]
    n = Normalization.of(pts)
    unit = n.to_unit(pts)
    np.testing.assert_allclose(np.ptp(unit, axis=0).max(), 1.0, rtol=1e-12)
    np.testing.assert_allclose(n.from_unit(unit), pts, rtol=0, atol=1e-12 * 1e3)
    assert unit is not pts


def test_unknown_format_and_missing_file(tmp_path):
    with pytest.raises(InvalidInput, match="unsupported file type"):
        read_mesh(tmp_path / "x.fbx")
    with pytest.raises(InvalidInput, match="no such file"):
        read_mesh(tmp_path / "x.ply")
    (tmp_path / "empty.ply").write_bytes(b"")
    with pytest.raises(InvalidMesh, match="empty file"):
        read_mesh(tmp_path / "empty.ply")
    (tmp_path / "junk.stl").write_bytes(b"solid junk\nfacet nonsense\n")
    with pytest.raises((InvalidMesh,)):
        validate_mesh(read_mesh(tmp_path / "junk.stl"))
