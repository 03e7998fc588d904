"""Benchmark of rebuilding broken scans: our remesh beside Blender's voxel remesher and pymeshfix.

Each tool runs as a whole process (read, work, write) in a child, timed from outside with its peak
resident memory (getrusage of the child); the three run on the same input files in the same run,
so ratios hold even on a busy machine. Blender's voxel remesher (OpenVDB, through the bpy wheel
in .venv-blender, bench/blender_voxel.py) runs at the voxel size that gives our output's vertex
count (found in an untimed calibration run). pymeshfix (MeshFix, Attene 2010) repairs in place,
at the input's own vertex count.

Quality: Chamfer and Hausdorff to the input's surface (the scan before subdivision for the
millions-of-faces case, the same surface), hole-fill error (mean distance of the result over the
holes to the intact surface before the holes were cut), volume for the cup and the crossed bars
(closed forms), loose parts and watertightness.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from ..mesh import measures
from ..mesh.compare import surface_distance
from ..mesh.io import read_mesh, write_mesh
from ..mesh.types import TriangleMesh
from .scans import crossed_bars, open_cup, scanned_stone, subdivided

ROOT = Path(__file__).resolve().parents[3]
BLENDER_PYTHON = Path(os.environ.get("ISOCLAY_BLENDER_PYTHON", ROOT / ".venv-blender" / "bin" / "python"))

_WRAPPER = (
    "import json, resource, subprocess, sys, time\n"
    "t = time.perf_counter()\n"
    "p = subprocess.run(sys.argv[1:], capture_output=True, text=True)\n"
    "s = time.perf_counter() - t\n"
    "print(json.dumps({'seconds': s, 'peak_mb': resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024,"
    " 'code': p.returncode, 'stdout': p.stdout[-2000:], 'stderr': p.stderr[-2000:]}))\n"
)
_PYMESHFIX = (
    "import sys, numpy as np, pymeshfix, trimesh\n"
    "m = trimesh.load(sys.argv[1], process=False)\n"
    "fix = pymeshfix.MeshFix(np.asarray(m.vertices), np.asarray(m.faces))\n"
    "fix.repair()\n"
    "trimesh.Trimesh(fix.points, fix.faces, process=False).export(sys.argv[2])\n"
)
_OURS = "import sys\nfrom isoclay.cli import main\nsys.exit(main())\n"


def _timed(cmd: list[str]) -> dict:
    out = subprocess.run([sys.executable, "-c", _WRAPPER, *map(str, cmd)], capture_output=True, text=True)
    result = json.loads(out.stdout.strip().splitlines()[-1])
    if result["code"] != 0:
        result["error"] = (result["stderr"] or result["stdout"]).strip().splitlines()[-1:] or ["failed"]
    return result


def _ours(src: Path, out: Path) -> dict:
    return _timed([sys.executable, "-c", _OURS, "--quiet", "remesh", src, "--out", out])


def _voxel(src: Path, out: Path, vertices: int) -> dict:
    if not BLENDER_PYTHON.exists():
        return {"missing": f"{BLENDER_PYTHON} not found (bash solver/setup.sh creates it)"}
    script = Path(__file__).with_name("blender_voxel.py")
    cal = subprocess.run([str(BLENDER_PYTHON), str(script), str(src), "--calibrate", str(vertices)], capture_output=True, text=True)
    size = json.loads([line for line in cal.stdout.splitlines() if line.startswith("{")][-1])["voxel_size"]
    result = _timed([BLENDER_PYTHON, script, src, out, size])
    result["voxel_size"] = size
    return result


def _pymeshfix(src: Path, out: Path) -> dict:
    try:
        import pymeshfix  # noqa: F401
    except ImportError:
        return {"missing": "pymeshfix is not installed (pip install -e '.[test]')"}
    return _timed([sys.executable, "-c", _PYMESHFIX, src, out])


def _quality(path: Path, reference: TriangleMesh, intact: TriangleMesh | None, holes: np.ndarray | None,
             samples: int) -> dict:
    import igl

    from ..field.supervision import sample_surface

    mesh = read_mesh(path)
    d = surface_distance(mesh, reference, samples)
    # how closely the result keeps the scan's own surface (one way: the fill over holes and an open
    # scan's missing side have no counterpart in the input)
    pts, _ = sample_surface(reference, samples, np.random.default_rng(2))
    sq = igl.point_mesh_squared_distance(pts, np.ascontiguousarray(mesh.vertices), np.ascontiguousarray(mesh.faces))[0]
    kept = float(np.sqrt(sq).mean() / measures.bbox_diagonal(reference.vertices))
    parts, _ = measures.face_components(mesh.n_vertices, mesh.faces)
    out = {"vertices": mesh.n_vertices, "faces": mesh.n_faces, "chamfer_rel": d.chamfer_rel, "hausdorff_rel": d.hausdorff_rel,
           "input_to_result_rel": kept,
           "watertight": measures.is_watertight(mesh.faces), "parts": int(parts),
           "volume": measures.signed_volume(mesh.vertices, mesh.faces)}
    if intact is not None and holes is not None and len(holes):
        out["hole_fill_error_rel"] = _hole_fill_error(mesh, intact, holes, samples)
    return out


def _hole_fill_error(mesh: TriangleMesh, intact: TriangleMesh, holes: np.ndarray, samples: int) -> float:
    """Mean distance to the intact surface of the result's points whose nearest intact point lies in
    a hole (a fill as smooth as a membrane stays close), over the intact surface's diagonal."""
    import igl

    from ..field.supervision import sample_surface

    pts, _ = sample_surface(mesh, samples, np.random.default_rng(1))
    sq, face, _ = igl.point_mesh_squared_distance(pts, np.ascontiguousarray(intact.vertices), np.ascontiguousarray(intact.faces))
    over = np.isin(face, holes)
    return float(np.sqrt(sq[over]).mean() / measures.bbox_diagonal(intact.vertices)) if over.any() else float("nan")


def _case(name: str, mesh: TriangleMesh, work: Path, reference: TriangleMesh | None = None, intact=None, holes=None,
          repeats: int = 1, samples: int = 50_000, extra=None) -> dict:
    src = work / f"{name}.ply"
    write_mesh(src, mesh)
    reference = reference if reference is not None else mesh
    row: dict = {"input": {"vertices": mesh.n_vertices, "faces": mesh.n_faces}}
    runs = {"ours": [], "voxel_remesher": [], "pymeshfix": []}
    ours_out, voxel_out, fix_out = work / f"{name}_ours.ply", work / f"{name}_voxel.ply", work / f"{name}_fix.ply"
    for _ in range(repeats):
        runs["ours"].append(_ours(src, ours_out))
    if "error" in runs["ours"][-1]:
        return {**row, "ours": runs["ours"][-1]}
    row["ours"] = _quality(ours_out, reference, intact, holes, samples)
    for _ in range(repeats):
        runs["voxel_remesher"].append(_voxel(src, voxel_out, row["ours"]["vertices"]))
    if "missing" not in runs["voxel_remesher"][-1] and "error" not in runs["voxel_remesher"][-1]:
        row["voxel_remesher"] = {"voxel_size": runs["voxel_remesher"][-1]["voxel_size"],
                                 **_quality(voxel_out, reference, intact, holes, samples)}
    runs["pymeshfix"].append(_pymeshfix(src, fix_out))
    if "missing" not in runs["pymeshfix"][-1] and "error" not in runs["pymeshfix"][-1]:
        row["pymeshfix"] = _quality(fix_out, reference, intact, holes, samples)
    for tool, rs in runs.items():
        ok = [r for r in rs if "seconds" in r and r.get("code") == 0]
        if ok:
            row.setdefault(tool, {}).update(seconds=min(r["seconds"] for r in ok), peak_mb=max(r["peak_mb"] for r in ok),
                                            seconds_all=[r["seconds"] for r in ok])
        elif rs:
            row.setdefault(tool, {})["failed"] = {k: rs[-1].get(k) for k in ("missing", "error") if k in rs[-1]}
    for tool in ("voxel_remesher", "pymeshfix"):
        ref = row.get(tool, {})
        if "seconds" in ref and "seconds" in row["ours"]:
            row[f"ratio_to_{tool}"] = {
                "seconds": row["ours"]["seconds"] / ref["seconds"],
                "peak_memory": row["ours"]["peak_mb"] / ref["peak_mb"],
                "chamfer": row["ours"]["chamfer_rel"] / max(ref["chamfer_rel"], 1e-300),
                "input_to_result": row["ours"]["input_to_result_rel"] / max(ref["input_to_result_rel"], 1e-300),
                **({"hole_fill_error": row["ours"]["hole_fill_error_rel"] / ref["hole_fill_error_rel"]}
                   if "hole_fill_error_rel" in ref and "hole_fill_error_rel" in row["ours"] else {}),
            }
    if extra:
        row.update(extra(row))
    return row


def run(quick: bool) -> dict:
    load_before = os.getloadavg()
    t0 = time.perf_counter()
    out: dict = {"note": "whole-process seconds and peak resident MB of each tool as a child process, same inputs, same run"}
    demo = ROOT / "demo_blends"
    with tempfile.TemporaryDirectory(prefix="isoclay-bench-remesh-") as tmp:
        work = Path(tmp)
        cases = out.setdefault("cases", {})
        for name in ("stone", "anvil"):
            if (demo / f"{name}.ply").exists():
                cases[f"demo_{name}"] = _case(f"demo_{name}", read_mesh(demo / f"{name}.ply"), work)
        scan = scanned_stone(resolution=135)
        cases["scan_35k_holes"] = _case("scan", scan.mesh, work, intact=scan.intact, holes=scan.hole_faces,
                                        repeats=1 if quick else 2)
        cup, h = open_cup()
        r = 0.5
        cap = np.pi * h * h * (3 * r - h) / 3  # spherical cap, handbook formula
        expected = 4 / 3 * np.pi * r**3 - cap
        cases["open_cup"] = _case("cup", cup, work, extra=lambda row: {
            "closed_volume_expected": expected,
            "volume_error": {t: row[t]["volume"] / expected - 1 for t in ("ours", "voxel_remesher", "pymeshfix") if "volume" in row.get(t, {})}})
        bars, union = crossed_bars()
        cases["crossed_bars"] = _case("bars", bars, work, extra=lambda row: {
            "union_volume_expected": union,
            "volume_error": {t: row[t]["volume"] / union - 1 for t in ("ours", "voxel_remesher", "pymeshfix") if "volume" in row.get(t, {})}})
        if not quick:
            base = scanned_stone(resolution=112, seed=1)
            big = subdivided(base.mesh, 3)
            cases["scan_3m_faces"] = _case("scan3m", big, work, reference=base.mesh, samples=30_000)
    out["machine"] = {"load_average_before": load_before, "load_average_after": os.getloadavg(), "cpus": os.cpu_count(),
                      "noise": "seconds_all lists repeated runs of the same tool; their spread is the run-to-run noise"}
    out["seconds"] = time.perf_counter() - t0
    return out
