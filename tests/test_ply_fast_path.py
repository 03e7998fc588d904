"""Binary PLY of positions and triangles is read and written with numpy alone, matching trimesh.

References: the trimesh library (`trimesh.load`, `Trimesh.export`, trimesh 5.2) and the PLY format
spec (Greg Turk, 1994, "The PLY polygon file format"): an ASCII header up to `end_header`, then
per element one packed record per item in the header's byte order, a list property stored as its
count followed by that many entries.
"""

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import trimesh

from isoclay.errors import InvalidMesh
from isoclay.mesh import TriangleMesh, read_mesh, write_mesh
from isoclay.mesh.io import read_vertex_values

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def stone():
    """A bumpy icosphere: 642 vertices, 1280 faces, positions that do not round-trip through float32."""
    base = trimesh.creation.icosphere(subdivisions=3, radius=2.0)
    rng = np.random.default_rng(7)
    return base.vertices * (1.0 + 0.05 * rng.random((len(base.vertices), 1))) + [0.1, -0.3, 5.0], base.faces


def ply_by_hand(path, vertices, faces, order="<", position="float", count="uchar", index="int",
                list_name="vertex_indices", extra=None, comments=("comment by hand", "obj_info test")):
    """Write a binary PLY following Turk 1994, independently of isoclay and trimesh.

    extra : name -> (n,) float32 vertex properties after x, y, z; faces : list of index lists (any length).
    """
    kinds = {"float": "f4", "double": "f8", "uchar": "u1", "ushort": "u2", "int": "i4", "uint": "u4"}
    extra = extra or {}
    fmt = "binary_little_endian" if order == "<" else "binary_big_endian"
    header = ["ply", f"format {fmt} 1.0", *comments, f"element vertex {len(vertices)}"]
    header += [f"property {position} {axis}" for axis in "xyz"] + [f"property float {k}" for k in extra]
    header += [f"element face {len(faces)}", f"property list {count} {index} {list_name}", "end_header"]
    records = np.empty(len(vertices), [(a, order + kinds[position]) for a in "xyz"] + [(k, order + "f4") for k in extra])
    for i, axis in enumerate("xyz"):
        records[axis] = np.asarray(vertices)[:, i]
    for k, v in extra.items():
        records[k] = v
    body = b"".join(np.array([len(f)], order + kinds[count]).tobytes() + np.array(f, order + kinds[index]).tobytes()
                    for f in faces)
    path.write_bytes(("\n".join(header) + "\n").encode() + records.tobytes() + body)
    return path


def in_fresh_python(code):
    """Run code in a new interpreter (PYTHONPATH=solver), return its last stdout line as JSON."""
    env = dict(os.environ, PYTHONPATH=os.path.join(ROOT, "solver"))
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60, env=env)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.strip().splitlines()[-1])


@pytest.fixture(scope="module")
def plain_files(tmp_path_factory):
    """Three position-and-triangle PLYs: trimesh's own export (float32, little-endian), a
    float64 one and a big-endian one with `vertex_index`, uint indices and ushort counts."""
    d = tmp_path_factory.mktemp("plain")
    v, f = stone()
    exported = d / "trimesh_export.ply"
    exported.write_bytes(trimesh.Trimesh(v, f, process=False).export(file_type="ply"))
    double = ply_by_hand(d / "double.ply", v, f.tolist(), position="double")
    big = ply_by_hand(d / "big_endian.ply", v, f.tolist(), order=">", count="ushort", index="uint", list_name="vertex_index")
    return [exported, double, big]


def test_plain_ply_reads_like_trimesh_without_importing_it(plain_files, tmp_path):
    # Reference: trimesh.load(..., process=False) of the same file, exact (same stored numbers).
    out = tmp_path / "arrays.npz"
    code = (
        "import sys, json, numpy as np\n"
        "from isoclay.mesh.io import read_mesh\n"
        f"meshes = [read_mesh(p) for p in {[str(p) for p in plain_files]!r}]\n"
        f"np.savez({str(out)!r}, *[a for m in meshes for a in (m.vertices, m.faces)])\n"
        "print(json.dumps({'trimesh': 'trimesh' in sys.modules, 'sources': [m.source is None for m in meshes],"
        " 'values': [m.vertex_values == {} for m in meshes]}))\n"
    )
    seen = in_fresh_python(code)
    assert seen == {"trimesh": False, "sources": [True] * 3, "values": [True] * 3}
    arrays = np.load(out)
    for i, path in enumerate(plain_files):
        ref = trimesh.load(path, process=False)
        vertices, faces = arrays[f"arr_{2 * i}"], arrays[f"arr_{2 * i + 1}"]
        assert vertices.dtype == np.float64 and vertices.shape == (642, 3), path.name
        assert faces.dtype == np.int64 and faces.shape == (1280, 3), path.name
        np.testing.assert_array_equal(vertices, ref.vertices, err_msg=path.name)
        np.testing.assert_array_equal(faces, ref.faces, err_msg=path.name)
    # the float64 file keeps full precision (float64 positions as written, exact)
    np.testing.assert_array_equal(arrays["arr_2"], stone()[0])


def test_vertex_colours_go_through_trimesh_and_are_kept(tmp_path):
    # Reference: Trimesh.export writes colours as uchar red green blue alpha; trimesh.load reads them back.
    v, f = stone()
    colours = np.random.default_rng(1).integers(0, 256, (len(v), 4), dtype=np.uint8)
    mesh = trimesh.Trimesh(v, f, vertex_colors=colours, process=False)
    path = tmp_path / "coloured.ply"
    path.write_bytes(mesh.export(file_type="ply"))
    back = read_mesh(path)
    assert isinstance(back.source, trimesh.Trimesh)
    np.testing.assert_array_equal(back.source.visual.vertex_colors, colours)
    np.testing.assert_allclose(back.vertices, v, rtol=0, atol=1e-6 * 7)  # float32 positions


def test_quads_are_triangulated_as_trimesh_does(tmp_path):
    # Reference: trimesh.load triangulates quads (trimesh.geometry.triangulate_quads); a 2 x 1 strip of squares.
    v = [[0, 0, 0], [1, 0, 0], [2, 0, 0], [0, 1, 0], [1, 1, 0], [2, 1, 0]]
    path = ply_by_hand(tmp_path / "quads.ply", v, [[0, 1, 4, 3], [1, 2, 5, 4]])
    back = read_mesh(path)
    ref = trimesh.load(path, process=False)
    assert back.n_faces == 4 and isinstance(back.source, trimesh.Trimesh)
    np.testing.assert_array_equal(back.faces, ref.faces)


def test_polygon_counts_that_fit_the_size_of_triangles_are_not_misread(tmp_path):
    # A 4-gon then a 2-gon take the bytes of two triangles (Turk 1994 list layout); only the
    # per-face count tells them apart. trimesh 5.2 refuses this file, and so must we.
    v = [[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0]]
    path = ply_by_hand(tmp_path / "odd.ply", v, [[0, 1, 2, 3], [0, 2]])
    with pytest.raises(Exception):
        trimesh.load(path, process=False)
    with pytest.raises(InvalidMesh, match="odd.ply could not be read as PLY"):
        read_mesh(path)


def test_ascii_ply_reads_as_before(tmp_path):
    # Reference: Trimesh.export(encoding="ascii") and trimesh.load of the same file.
    v, f = stone()
    path = tmp_path / "text.ply"
    path.write_bytes(trimesh.Trimesh(v, f, process=False).export(file_type="ply", encoding="ascii"))
    back = read_mesh(path)
    ref = trimesh.load(path, process=False)
    assert isinstance(back.source, trimesh.Trimesh)
    np.testing.assert_array_equal(back.vertices, ref.vertices)
    np.testing.assert_array_equal(back.faces, ref.faces)


@pytest.mark.parametrize("damage", ["truncated", "trailing bytes", "header only"])
def test_damaged_binary_gives_the_usual_message(plain_files, tmp_path, damage):
    # trimesh raises "PLY is unexpected length!" for these; read_mesh turns that into one InvalidMesh line.
    data = plain_files[0].read_bytes()
    end = data.index(b"end_header\n") + len(b"end_header\n")
    damaged = {"truncated": data[:-5], "trailing bytes": data + b"\0" * 13, "header only": data[:end]}[damage]
    path = tmp_path / "damaged.ply"
    path.write_bytes(damaged)
    with pytest.raises(InvalidMesh, match=r"damaged.ply could not be read as PLY \(ValueError: .*\): re-export it"):
        read_mesh(path)


def test_no_faces_gives_the_point_cloud_message(tmp_path):
    # Reference: trimesh.load returns a trimesh.PointCloud for a PLY whose face element is empty.
    path = ply_by_hand(tmp_path / "points.ply", [[0, 0, 0], [1, 0, 0], [0, 1, 0]], [])
    with pytest.raises(InvalidMesh, match="points.ply has no faces \\(3 loose points\\)"):
        read_mesh(path)


def test_written_ply_loads_in_trimesh_with_values_by_name(tmp_path):
    # Reference: trimesh.load (positions, faces, metadata["_ply_raw"]) and the bytes of Trimesh.export
    # with the same vertex_attributes: same records after the header, so the same precision as before.
    v, f = stone()
    stretch = np.linspace(0.0, 2.0, len(v), dtype=np.float32)
    bend = np.cos(np.arange(len(v))).astype(np.float32)
    path = tmp_path / "out.ply"
    write_mesh(path, TriangleMesh(v, f, {"stretch": stretch, "bend": bend}))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.ply"]  # no .partial left behind

    back = trimesh.load(path, process=False)
    np.testing.assert_array_equal(back.vertices, v.astype(np.float32))
    np.testing.assert_allclose(back.vertices, v, rtol=1e-7, atol=0)  # float32: 2**-24 relative
    np.testing.assert_array_equal(back.faces, f)
    raw = back.metadata["_ply_raw"]["vertex"]["data"]
    assert raw.dtype.names == ("x", "y", "z", "stretch", "bend")
    np.testing.assert_array_equal(raw["stretch"], stretch)
    np.testing.assert_array_equal(raw["bend"], bend)

    values = read_vertex_values(path)
    assert list(values) == ["stretch", "bend"]
    np.testing.assert_array_equal(values["stretch"], stretch)
    np.testing.assert_array_equal(values["bend"], bend)
    assert values["bend"].dtype == np.float32

    reference = trimesh.Trimesh(v, f, process=False)
    reference.vertex_attributes = {"stretch": stretch, "bend": bend}
    expected = reference.export(file_type="ply")
    written = path.read_bytes()
    assert written[written.index(b"end_header"):] == expected[expected.index(b"end_header"):]


def test_write_and_read_back_without_trimesh(tmp_path):
    # What a command-line run does: read a plain PLY, write one; trimesh must stay unloaded.
    v, f = stone()
    src = ply_by_hand(tmp_path / "in.ply", v, f.tolist())
    out = tmp_path / "out.ply"
    code = (
        "import sys, json\n"
        "from isoclay.mesh.io import read_mesh, write_mesh, read_vertex_values\n"
        f"m = read_mesh({str(src)!r})\n"
        f"write_mesh({str(out)!r}, m.with_vertices(m.vertices * 2.0, moved=m.vertices[:, 0]), keep_source=True)\n"
        f"values = read_vertex_values({str(out)!r})\n"
        "print(json.dumps({'trimesh': 'trimesh' in sys.modules, 'values': sorted(values)}))\n"
    )
    assert in_fresh_python(code) == {"trimesh": False, "values": ["moved"]}
    back = trimesh.load(out, process=False)
    np.testing.assert_allclose(back.vertices, v * 2.0, rtol=1e-7, atol=0)
    np.testing.assert_array_equal(back.faces, f)


def test_read_vertex_values_of_a_big_endian_file(tmp_path):
    # Reference: trimesh's metadata["_ply_raw"] of a hand-written big-endian file (Turk 1994).
    v, f = stone()
    stretch = np.linspace(-1.0, 1.0, len(v), dtype=np.float32)
    path = ply_by_hand(tmp_path / "be.ply", v, f.tolist(), order=">", extra={"stretch": stretch, "nx": stretch})
    raw = trimesh.load(path, process=False).metadata["_ply_raw"]["vertex"]["data"]
    values = read_vertex_values(path)
    assert list(values) == ["stretch"]  # nx is a normal, not a value
    np.testing.assert_array_equal(values["stretch"], raw["stretch"])
    np.testing.assert_array_equal(values["stretch"], stretch)


def test_keep_source_still_carries_colours(tmp_path):
    # Reference: Trimesh.export writes the source's vertex colours; the numpy writer is only for plain meshes.
    v, f = stone()
    colours = np.full((len(v), 4), [200, 10, 30, 255], dtype=np.uint8)
    src = tmp_path / "coloured.ply"
    src.write_bytes(trimesh.Trimesh(v, f, vertex_colors=colours, process=False).export(file_type="ply"))
    mesh = read_mesh(src)
    out = tmp_path / "moved.ply"
    write_mesh(out, mesh.with_vertices(mesh.vertices + 1.0), keep_source=True)
    back = trimesh.load(out, process=False)
    np.testing.assert_array_equal(back.visual.vertex_colors, colours)
    # positions were float32 in the file; moved in float64, stored as float32 again
    np.testing.assert_array_equal(back.vertices, (mesh.vertices + 1.0).astype(np.float32))


def test_keep_topology_writes_the_plain_files_own_faces(tmp_path):
    # A plain PLY has no trimesh source object any more; --keep-topology must still write the
    # artist's faces exactly as given (here one degenerate face, which validation drops from the
    # copy the solver works on), not the validated copy. Reference: the input file itself.
    v, f = stone()
    faces = np.concatenate([f, [[0, 0, 1]]])  # a zero-area face with a repeated corner
    src = ply_by_hand(tmp_path / "in.ply", v, faces.tolist())
    env = dict(os.environ, PYTHONPATH=os.path.join(ROOT, "solver"), ISOCLAY_THREADS="1")
    done = subprocess.run([sys.executable, "-m", "isoclay.cli", "--quiet", "smooth", str(src), "--out",
                           str(tmp_path / "out.ply"), "--keep-topology", "--strength", "0.02", "--field-resolution", "64"],
                          capture_output=True, text=True, timeout=300, env=env)
    assert done.returncode == 0, done.stderr
    out = trimesh.load(tmp_path / "out.ply", process=False)
    np.testing.assert_array_equal(np.asarray(out.faces), faces)
    assert len(out.vertices) == len(v) and not np.allclose(out.vertices, np.asarray(v, np.float32))
