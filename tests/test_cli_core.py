"""The command line: exit codes and one-line errors (DESIGN.md contract), fit and remesh end to end."""

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import trimesh

from isoclay.mesh import measures, read_mesh

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def isoclay(*args, timeout=300):
    env = dict(os.environ, PYTHONPATH=os.path.join(ROOT, "solver"), ISOCLAY_THREADS="1")
    return subprocess.run([sys.executable, "-m", "isoclay.cli", "--quiet", *args], capture_output=True, text=True, timeout=timeout, env=env)


def write_ascii_ply(path, vertices, faces):
    lines = ["ply", "format ascii 1.0", f"element vertex {len(vertices)}", "property float x", "property float y",
             "property float z", f"element face {len(faces)}", "property list uchar int vertex_indices", "end_header"]
    lines += [" ".join(str(c) for c in v) for v in vertices]
    lines += ["3 " + " ".join(str(i) for i in f) for f in faces]
    path.write_text("\n".join(lines) + "\n")


def one_line_error(result, code=2):
    assert result.returncode == code, result.stderr
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("isoclay: "), result.stderr
    assert "Traceback" not in result.stderr
    return lines[0]


BAD_PLY = {
    "nan": ([[0, 0, 0], [1, 0, 0], ["nan", 1, 0]], [[0, 1, 2]], "NaN"),
    "index": ([[0, 0, 0], [1, 0, 0], [0, 1, 0]], [[0, 1, 9]], "face index 9"),
    "degenerate": ([[0, 0, 0], [1, 0, 0], [2, 0, 0]], [[0, 1, 2]], "degenerate"),
    "huge": ([[0, 0, 0], [1e9, 0, 0], [0, 1e9, 0]], [[0, 1, 2]], "absurd size"),
    "no faces": ([[0, 0, 0], [1, 0, 0], [0, 1, 0]], [], "no faces"),
}


@pytest.mark.parametrize("case", sorted(BAD_PLY))
def test_bad_meshes_through_cli(tmp_path, case):
    v, f, words = BAD_PLY[case]
    write_ascii_ply(tmp_path / "bad.ply", v, f)
    line = one_line_error(isoclay("remesh", str(tmp_path / "bad.ply"), "--out", str(tmp_path / "o.ply")))
    assert words in line
    assert not (tmp_path / "o.ply").exists()


def test_command_line_rebuild_never_loads_torch(tmp_path):
    # Importing torch costs 1-3 s and 220 MB of every run on this machine (measured); a rebuild reads
    # the field's values only, so the remesh command must finish without it, with the same result
    # as the torch module path (closed mesh, written) and refinement steps (which need torch) still
    # available. Reference: the Python import system's own record (sys.modules).
    sphere = trimesh.creation.icosphere(subdivisions=3)
    sphere.export(tmp_path / "s.ply")
    code = ("import sys; from isoclay.cli import main; rc = main(sys.argv[1:]); "
            "print('TORCH' if 'torch' in sys.modules else 'NO-TORCH'); sys.exit(rc)")
    env = dict(os.environ, PYTHONPATH=os.path.join(ROOT, "solver"), ISOCLAY_THREADS="1")
    for extra, expected in (((), "NO-TORCH"), (("--fit-steps", "2"), "TORCH")):
        r = subprocess.run([sys.executable, "-c", code, "--quiet", "remesh", str(tmp_path / "s.ply"), "--out",
                            str(tmp_path / "o.ply"), "--resolution", "48", "--field-resolution", "64", *extra],
                           capture_output=True, text=True, timeout=300, env=env)
        assert r.returncode == 0, r.stderr
        assert r.stdout.strip().splitlines()[-1] == expected
        assert measures.is_watertight(read_mesh(tmp_path / "o.ply").faces)


def test_bad_arguments(tmp_path):
    assert "no such file" in one_line_error(isoclay("remesh", str(tmp_path / "none.ply"), "--out", str(tmp_path / "o.ply")))
    sphere = tmp_path / "s.ply"
    trimesh.creation.icosphere(2).export(sphere)
    assert "unsupported output type" in one_line_error(isoclay("remesh", str(sphere), "--out", str(tmp_path / "o.fbx")))
    assert "does not exist" in one_line_error(isoclay("remesh", str(sphere), "--out", str(tmp_path / "nodir" / "o.ply")))
    assert "resolution" in one_line_error(isoclay("remesh", str(sphere), "--out", str(tmp_path / "o.ply"), "--field-resolution", "4"))
    assert isoclay("remesh", str(sphere)).returncode == 2  # argparse: missing --out
    assert isoclay("frobnicate").returncode == 2


def test_fit_and_remesh_end_to_end(tmp_path):
    src = trimesh.creation.capsule(height=1.0, radius=0.3, count=[48, 48])
    src.export(tmp_path / "capsule.obj")
    fit = isoclay("fit", str(tmp_path / "capsule.obj"), "--out", str(tmp_path / "f.pt"), "--field-resolution", "48")
    assert fit.returncode == 0, fit.stderr
    assert (tmp_path / "f.pt").stat().st_size > 0
    r = isoclay("remesh", str(tmp_path / "capsule.obj"), "--out", str(tmp_path / "c.stl"), "--resolution", "64",
                "--field-resolution", "48", "--report", str(tmp_path / "r.json"))
    assert r.returncode == 0, r.stderr
    report = json.loads((tmp_path / "r.json").read_text())
    for key in ("task", "seconds", "bbox_diagonal", "vertices", "faces", "watertight"):
        assert key in report
    assert report["watertight"] and "total" in report["seconds"]
    out = read_mesh(tmp_path / "c.stl")
    # capsule volume pi r^2 h + 4/3 pi r^3 (common practice) in the input's own units, within 2%
    expected = np.pi * 0.09 * 1.0 + 4 / 3 * np.pi * 0.027
    from isoclay.mesh import validate_mesh

    clean = validate_mesh(out).mesh
    np.testing.assert_allclose(measures.signed_volume(clean.vertices, clean.faces), expected, rtol=0.02)
    np.testing.assert_allclose(report["bbox_diagonal"], np.linalg.norm([0.6, 0.6, 1.6]), rtol=1e-3)
