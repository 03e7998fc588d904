"""Benchmark of `isoclay batch`: five generated 40k-vertex scans, remesh + smooth, on two local Dask workers,
against a sequential loop of the same `isoclay remesh` and `isoclay smooth` commands run here too.

Figures: wall time of each, their ratio (target <= 0.7), the batch machinery's overhead per item
(target <= 0.5 s: the batch's own wall time less the busiest worker's item seconds, over the items;
once with and once without the LocalCluster's start-up, which a studio cluster does not pay), how
far the batch's results lie from the loop's (the batch carries the field from remesh to smooth
instead of fitting again), and the contact sheet's thumbnails by the numpy rasteriser against
Cycles (bpy wheel) on the same meshes.
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

#: Targets from issue 15.
TARGET_RATIO = 0.7
TARGET_OVERHEAD_S = 0.5


def _isoclay(*args, env) -> float:
    t0 = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "isoclay.cli", "--quiet", *args], capture_output=True, text=True, env=env)
    if done.returncode not in (0, 2):
        raise RuntimeError(f"isoclay {args[0]} failed: {done.stderr.strip()[-300:]}")
    return time.perf_counter() - t0


def run(quick: bool) -> dict:
    from ..batch.example_library import write_library
    from ..mesh.compare import surface_distance
    from ..mesh.io import read_mesh

    vertices = 10_000 if quick else 40_000
    resolution, fit_resolution, strength = (128, 64, 0.5) if quick else (256, 128, 0.5)
    work = Path(tempfile.mkdtemp(prefix="isoclay-bench-batch-"))
    scans = write_library(work / "scans", count=5, vertices=vertices)
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[2]))
    env.pop("ISOCLAY_THREADS", None)  # each side uses the machine as a user's run would (CLI: free cores)

    # the reference: the same two commands per scan, one after the other
    loop_dir = work / "loop"
    loop_dir.mkdir()
    t0 = time.perf_counter()
    per_command = []
    for scan in scans:
        remeshed, smoothed = loop_dir / f"{scan.stem}_remeshed.ply", loop_dir / f"{scan.stem}_clean.ply"
        per_command.append(_isoclay("remesh", str(scan), "--out", str(remeshed), "--resolution", str(resolution),
                                    "--field-resolution", str(fit_resolution), env=env))
        per_command.append(_isoclay("smooth", str(remeshed), "--strength", str(strength), "--out", str(smoothed),
                                    "--resolution", str(resolution), "--field-resolution", str(fit_resolution), env=env))
    loop_seconds = time.perf_counter() - t0

    plan = work / "plan.toml"
    plan.write_text(f"""
[inputs]
paths = ["scans/*.ply"]
[output]
folder = "batch"
name = "{{stem}}_clean.ply"
contact_sheet = false
[fit]
resolution = {fit_resolution}
[[steps]]
task = "remesh"
resolution = {resolution}
[[steps]]
task = "smooth"
strength = {strength}
resolution = {resolution}
[cluster]
workers = 2
""")
    batch_seconds = _isoclay("batch", str(plan), env=env)
    record = json.loads((work / "batch" / "batch.json").read_text())
    with open(work / "batch" / "summary.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    busy: dict = {}
    for row in rows:
        busy[row["worker"]] = busy.get(row["worker"], 0.0) + float(row["seconds"])
    items = len(rows)
    inside = record["seconds"]["total"]  # run_batch: keys, submit, compute, publish, reports (no cluster start-up)
    overhead = (inside - max(busy.values())) / items
    overhead_startup = (batch_seconds - max(busy.values())) / items

    distances = []
    for row in rows:
        a = read_mesh(work / "batch" / row["output"])
        b = read_mesh(loop_dir / f"{Path(row['input']).stem}_clean.ply")
        distances.append(surface_distance(a, b, 20_000).chamfer_rel)
    out = {
        "scans": {"count": items, "vertices": [read_mesh(s).n_vertices for s in scans], "steps": "remesh + smooth",
                  "remesh_resolution": resolution, "fit_resolution": fit_resolution, "smooth_strength_mm": strength},
        "loop": {"seconds": loop_seconds, "commands": len(per_command), "per_command": per_command},
        "batch": {"seconds": batch_seconds, "workers": len(busy), "inside_seconds": inside,
                  "item_seconds": [float(r["seconds"]) for r in rows], "busiest_worker_seconds": max(busy.values()),
                  "statuses": sorted({r["status"] for r in rows}), "all_watertight": all(r["watertight"] == "True" for r in rows)},
        "ratio_to_loop": batch_seconds / loop_seconds,
        "meets_ratio": batch_seconds / loop_seconds <= TARGET_RATIO,
        "overhead_per_item_s": overhead,
        "overhead_per_item_with_startup_s": overhead_startup,
        "meets_overhead": overhead <= TARGET_OVERHEAD_S,
        "batch_vs_loop_chamfer_rel_max": max(distances),
        "thumbnails": _thumbnails(work, rows, scans),
        "load_average": os.getloadavg(),
    }
    return out


def _thumbnails(work: Path, rows, scans) -> dict:
    """Seconds for the five before/after thumbnail pairs: numpy rasteriser vs Cycles (if .venv-blender is there)."""
    from ..batch.contact_sheet import cycles_thumbnails, render_pair
    from ..mesh.io import read_mesh

    by_stem = {s.stem: s for s in scans}
    pairs = [(by_stem[Path(r["input"]).stem], work / "batch" / r["output"]) for r in rows]
    t0 = time.perf_counter()
    for before, after in pairs:
        render_pair(read_mesh(before), read_mesh(after))
    raster = time.perf_counter() - t0
    out = {"pairs": len(pairs), "raster_seconds": raster}
    python = Path(__file__).resolve().parents[3] / ".venv-blender" / "bin" / "python"
    if python.exists():
        listing = cycles_thumbnails([{"name": f"t{i}", "before": str(b), "after": str(a)} for i, (b, a) in enumerate(pairs)],
                                    work / "cycles", python)
        out["cycles_seconds"] = listing["seconds"]  # whole call: Blender start-up, reading, three renders per pair
        out["cycles_before_after_render_seconds"] = listing["before_after_render_seconds"]
        out["cycles_over_raster"] = listing["seconds"] / raster
        out["cycles_renders_over_raster"] = listing["before_after_render_seconds"] / raster
    else:
        out["cycles_seconds"] = None
    return out
