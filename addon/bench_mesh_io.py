"""Benchmark of the add-on's two speed targets; prints JSON.

    .venv-blender/bin/python addon/bench_mesh_io.py [--vertices 200000] [--repeats 5] [--no-solver]

1. Reading a 200k-vertex mesh out of Blender (evaluated mesh, positions and triangles, world
   transform) plus writing a result of the same size back as a new mesh: target <= 0.5 s together.
2. The longest time the UI thread spent in a job's poll() while a real solver (started from
   .venv, or ISOCLAY_SOLVER_PYTHON) receives, echoes and returns that mesh: target <= 50 ms.
"""

from __future__ import annotations

import argparse
import atexit
import importlib
import importlib.util
import json
import os
import shutil
import sys
import tempfile
import time
import types

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)


def _load_addon_modules(stage_dir: str):
    """The add-on's modules as package `isoclay_bench_addon`, staged with the solver's client copies."""
    spec = importlib.util.spec_from_file_location("isoclay_addon_build", os.path.join(HERE, "build.py"))
    build = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(build)
    build.stage(stage_dir, [])
    package = types.ModuleType("isoclay_bench_addon")
    package.__path__ = [stage_dir]
    sys.modules["isoclay_bench_addon"] = package
    return {name: importlib.import_module(f"isoclay_bench_addon.{name}")
            for name in ("mesh_io", "jobs", "solver_process", "client")}


def _grid(n_vertices: int):
    import numpy as np

    side = int(np.ceil(np.sqrt(n_vertices)))
    u, v = np.meshgrid(np.linspace(-1, 1, side), np.linspace(-1, 1, side), indexing="ij")
    pos = np.stack([u, v, 0.1 * np.sin(3 * u) * np.cos(2 * v)], axis=-1).reshape(-1, 3).astype(np.float32)
    idx = np.arange(side * side).reshape(side, side)
    a, b, c, d = idx[:-1, :-1].ravel(), idx[1:, :-1].ravel(), idx[1:, 1:].ravel(), idx[:-1, 1:].ravel()
    return pos, np.concatenate([np.stack([a, b, c], 1), np.stack([a, c, d], 1)])


def bench_mesh_io(mods, n_vertices: int, repeats: int) -> dict:
    import bpy
    import numpy as np

    mio = mods["mesh_io"]
    pos, faces = _grid(n_vertices)
    source = bpy.data.objects.new("bench source", mio.build_mesh("bench source", pos, faces))
    bpy.context.scene.collection.objects.link(source)
    source.location = (0.5, -1.0, 2.0)
    bpy.context.view_layer.update()
    reads, writes = [], []
    for _ in range(repeats):
        t = time.perf_counter()
        world, tri = mio.read_world_mesh(source, bpy.context.evaluated_depsgraph_get())
        reads.append(time.perf_counter() - t)
        t = time.perf_counter()
        local = mio.to_local(world, mio.matrix_to_numpy(source.matrix_world))
        mesh = mio.build_mesh("bench result", local, tri)
        writes.append(time.perf_counter() - t)
        bpy.data.meshes.remove(mesh)
    read, write = float(np.median(reads)), float(np.median(writes))
    return {"vertices": int(len(pos)), "triangles": int(len(faces)), "read_s": read, "write_s": write,
            "read_plus_write_s": read + write, "target_s": 0.5, "met": read + write <= 0.5,
            "repeats": repeats}, (world, tri)


def bench_poll(mods, world, faces) -> dict:
    python = os.environ.get("ISOCLAY_SOLVER_PYTHON", os.path.join(ROOT, ".venv", "bin", "python"))
    if not os.path.isfile(python):
        return {"skipped": f"no solver environment at {python}"}
    link = mods["solver_process"].SolverLink(mods["client"])
    with tempfile.TemporaryDirectory(prefix="isoclay-bench-") as data:
        try:
            link.use_local(python, os.path.join(ROOT, "solver"), data, ("--test-params",))
            if link.wait_ready(120) != "connected":
                return {"skipped": f"solver did not start: {link.detail}"}
            connect = lambda: link.make_client(timeout_s=5.0, retries=1)  # noqa: E731
            job = mods["jobs"].EditJob(connect, mods["client"], "echo", {"delay_s": 1.0, "steps": 10},
                                       world, faces, "bench", poll_interval_s=0.05)
            polls = 0
            t0 = time.perf_counter()
            job.start()
            snap = job.poll()
            while not snap.finished and time.perf_counter() - t0 < 300:
                time.sleep(0.01)  # a UI timer step, shortened to poll often
                snap = job.poll()
                polls += 1
            return {"state": snap.state, "error": snap.error, "polls": polls,
                    "job_seconds": time.perf_counter() - t0,
                    "max_poll_block_ms": job.max_poll_block_s * 1000.0, "target_ms": 50.0,
                    "met": job.max_poll_block_s <= 0.05 and snap.state == "done"}
        finally:
            link.stop()


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--vertices", type=int, default=200_000)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--no-solver", action="store_true", help="skip the poll measurement")
    args = parser.parse_args(argv)
    if "BLENDER_USER_RESOURCES" not in os.environ:  # never touch the real Blender configuration
        user = tempfile.mkdtemp(prefix="isoclay-bench-user-")
        os.environ["BLENDER_USER_RESOURCES"] = user
        atexit.register(shutil.rmtree, user, True)
    import bpy

    bpy.ops.wm.read_homefile(use_empty=True)
    with tempfile.TemporaryDirectory(prefix="isoclay-bench-stage-") as stage:
        mods = _load_addon_modules(os.path.join(stage, "isoclay_blender"))
        mesh_io, (world, faces) = bench_mesh_io(mods, args.vertices, args.repeats)
        poll = {"skipped": "--no-solver"} if args.no_solver else bench_poll(mods, world, faces)
    print(json.dumps({"mesh_io": mesh_io, "poll": poll}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
