"""isoclay batch on Dask: a generated scan library (workshop pebbles, shards, clay pieces; our own
generator, isoclay.batch.example_library), one broken file and one duplicate, on a LocalCluster of two
workers, rerun, a worker killed mid-batch, and a real `dask scheduler` with two `dask worker` processes.

Outside references: result meshes are re-read and judged by trimesh (Trimesh.is_watertight,
Trimesh.volume), the summary's Chamfer figure is recomputed with trimesh.sample.sample_surface and
trimesh.proximity.closest_point, and Dask's own scheduler reports which worker ran what.
Sizes are small (about 5k-face scans, field and meshes at 48 cells) so the file runs in about a minute.
"""

import csv
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import trimesh

from isoclay.batch.example_library import write_library
from isoclay.batch.plan import load_plan
from isoclay.batch.store import ResultStore

ROOT = Path(__file__).resolve().parents[1]
BIN = Path(sys.executable).parent

PLAN = """
[inputs]
paths = ["scans/*.ply"]

[output]
folder = "{folder}"
name = "{{stem}}_clean.ply"

[fit]
resolution = 48

[[steps]]
task = "remesh"
resolution = 48

[[steps]]
task = "smooth"
strength = {strength}
resolution = 48

[[steps]]
task = "decimate"
target_faces = 1500

[[overrides]]
match = "shard_*"
smooth = {{ strength = 0.4 }}
"""


def write_plan(folder: Path, out: str, strength: float = 0.8, name: str = "plan.toml") -> Path:
    path = folder / name
    path.write_text(PLAN.format(folder=out, strength=strength))
    return path


@pytest.fixture(scope="module")
def library(tmp_path_factory):
    """4 scans (pebble, shard, clay, pebble), one byte-for-byte duplicate, one broken file: 6 inputs."""
    folder = tmp_path_factory.mktemp("library")
    write_library(folder / "scans", count=4, duplicates=1, broken=1)
    return folder


@pytest.fixture(scope="module")
def cluster():
    from isoclay.batch.cluster import connect

    c = connect(workers=2, torch_threads=1)
    yield c
    c.close()


def read_rows(summary: Path) -> dict:
    with open(summary, newline="") as fh:
        return {row["input"]: row for row in csv.DictReader(fh)}


def trimesh_chamfer_rel(result: trimesh.Trimesh, reference: trimesh.Trimesh, count: int = 4000) -> float:
    """Mean of the two mean closest-point distances over the reference's bbox diagonal (trimesh.proximity)."""
    a, _ = trimesh.sample.sample_surface(result, count, seed=1)
    b, _ = trimesh.sample.sample_surface(reference, count, seed=2)
    d1 = trimesh.proximity.closest_point(reference, a)[1]
    d2 = trimesh.proximity.closest_point(result, b)[1]
    return float((d1.mean() + d2.mean()) / 2 / np.linalg.norm(reference.extents))


def test_local_cluster_batch_broken_duplicate_then_rerun(library, cluster):
    from isoclay.batch.runner import run_batch

    plan = load_plan(write_plan(library, "clean"))
    result = run_batch(plan, cluster)
    assert result.exit_code == 2  # the broken file failed
    rows = read_rows(result.summary)
    assert len(rows) == 6
    good = ["scans/pebble_00.ply", "scans/shard_01.ply", "scans/clay_02.ply", "scans/pebble_03.ply"]
    for name in good:
        row = rows[name]
        assert row["status"] == "done", row
        assert row["worker"].startswith("tcp://127.0.0.1:")
        out = plan.output_folder / row["output"]
        mesh = trimesh.load(out, process=False)
        assert mesh.is_watertight  # trimesh's own check, not ours
        assert row["watertight"] == "True"
        assert len(mesh.faces) <= 1500
        source = trimesh.load(library / name, process=False)
        # Chamfer in the summary against trimesh's closest points (sampling noise: 35%)
        np.testing.assert_allclose(float(row["chamfer_rel"]), trimesh_chamfer_rel(mesh, source), rtol=0.35)
        assert float(row["chamfer_rel"]) < 0.01  # the clean-up stays within 1% of the diagonal
        if source.is_watertight:  # volume change against trimesh's volumes (closed inputs)
            np.testing.assert_allclose(float(row["volume_change"]), mesh.volume / source.volume - 1, atol=1e-6)
            assert abs(float(row["volume_change"])) < 0.05
        assert (plan.output_folder / row["report"]).is_file()
    broken = rows["scans/broken_00.ply"]
    assert broken["status"] == "failed" and "could not be read" in broken["reason"] and broken["output"] == ""
    assert "\n" not in broken["reason"]
    duplicate = rows["scans/pebble_00_copy.ply"]
    assert duplicate["status"] == "reused" and duplicate["same_as"] == "scans/pebble_00.ply"
    assert (plan.output_folder / duplicate["output"]).read_bytes() == (plan.output_folder / rows["scans/pebble_00.ply"]["output"]).read_bytes()
    store = ResultStore(plan.output_folder)
    assert len(store.completions()) == 4  # the duplicate was computed once
    # the contact sheet: one numbered tile per input, linked from every row
    from PIL import Image

    sheet = plan.output_folder / rows[good[0]]["contact_sheet"]
    assert Image.open(sheet).size[0] > 800 and sorted(int(r["tile"]) for r in rows.values()) == list(range(1, 7))
    assert not list(plan.output_folder.rglob("*.partial"))

    # rerun: nothing is computed again, the files are not rewritten
    stamps = {p: p.stat().st_mtime_ns for p in store.results.glob("*.ply")}
    again = run_batch(load_plan(write_plan(library, "clean")), cluster)
    rows2 = read_rows(again.summary)
    assert all(rows2[name]["status"] == "reused" for name in good + ["scans/pebble_00_copy.ply"])
    assert rows2["scans/broken_00.ply"]["status"] == "failed" and again.exit_code == 2
    assert len(store.completions()) == 4
    assert stamps == {p: p.stat().st_mtime_ns for p in store.results.glob("*.ply")}
    assert all(float(rows2[name]["seconds"]) == 0.0 for name in good)


def test_cancel_keeps_finished_items_and_writes_the_summary(library, cluster):
    """Ctrl-C (should_stop) after the first finished item: exit 3, that item published, the rest cancelled."""
    from isoclay.batch.runner import run_batch

    plan = load_plan(write_plan(library, "clean_cancelled", strength=0.9))
    store = ResultStore(plan.output_folder)
    result = run_batch(plan, cluster, should_stop=lambda: len(store.completions()) >= 1)
    assert result.exit_code == 3
    rows = read_rows(result.summary)
    finished = [r for r in rows.values() if r["status"] in ("done", "reused")]
    assert finished and all((plan.output_folder / r["output"]).is_file() for r in finished)
    assert any(r["status"] == "cancelled" for r in rows.values())
    assert all(r["output"] == "" for r in rows.values() if r["status"] == "cancelled")


def test_worker_killed_mid_batch_every_item_done_once(library, cluster):
    from isoclay.batch.runner import run_batch

    plan = load_plan(write_plan(library, "clean_killed", strength=0.7))
    client = cluster.client
    box = {}
    thread = threading.Thread(target=lambda: box.setdefault("result", run_batch(plan, cluster)))
    thread.start()
    victim = None
    deadline = time.monotonic() + 60
    while victim is None and time.monotonic() < deadline and thread.is_alive():
        executing = client.run(lambda dask_worker: [str(ts.key) for ts in dask_worker.state.executing])
        busy = [addr for addr, keys in executing.items() if any(k.startswith("isoclay-item-") for k in keys)]
        if busy:
            victim = busy[0]
        else:
            time.sleep(0.05)
    assert victim is not None, "no item started on a worker"
    time.sleep(0.3)  # well inside the item (each takes a second or more)
    pid = client.run(os.getpid, workers=[victim])[victim]
    os.kill(pid, signal.SIGKILL)
    thread.join(timeout=180)
    result = box["result"]
    rows = read_rows(result.summary)
    good = [r for name, r in rows.items() if "broken" not in name]
    assert all(r["status"] in ("done", "reused") for r in good), rows
    assert sum(r["status"] == "done" for r in good) == 4
    completions = ResultStore(plan.output_folder).completions()
    assert len(completions) == 4 and len(set(completions)) == 4  # every distinct item finished exactly once
    assert victim not in {r["worker"] for r in good}  # the killed worker's item was run again elsewhere
    assert not list(plan.output_folder.rglob("*.partial"))


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_real_dask_scheduler_and_two_workers(library, tmp_path):
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    env = dict(os.environ, OMP_WAIT_POLICY="PASSIVE", ISOCLAY_THREADS="1", PYTHONPATH=str(ROOT / "solver"))
    procs = [subprocess.Popen([str(BIN / "dask"), "scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
                              env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)]
    try:
        for _ in range(2):
            procs.append(subprocess.Popen([str(BIN / "dask"), "worker", address, "--nthreads", "1", "--nworkers", "1",
                                           "--host", "127.0.0.1", "--no-dashboard"],
                                          env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        plan = write_plan(library, str(tmp_path / "studio"), name="studio.toml")
        done = subprocess.run([sys.executable, "-m", "isoclay.cli", "--quiet", "batch", str(plan), "--scheduler", address],
                              env=env, capture_output=True, text=True, timeout=240)
        assert done.returncode == 2, done.stderr  # the broken file
        rows = read_rows(tmp_path / "studio" / "summary.csv")
        computed = [r for r in rows.values() if r["status"] == "done"]
        assert len(computed) == 4
        assert len({r["worker"] for r in computed}) == 2  # both dask workers took items
        assert rows["scans/broken_00.ply"]["status"] == "failed"
    finally:
        for p in reversed(procs):
            p.terminate()
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                p.kill()


def test_dry_run_bad_plan_one_line_each_nothing_run(library, tmp_path):
    plan = tmp_path / "bad.toml"
    plan.write_text(f"""
[inputs]
paths = ["{library}/scans/pebble_00.ply", "{library}/scans/missing.ply"]
[output]
folder = "{tmp_path / 'never'}"
[[steps]]
task = "remesh"
[[steps]]
task = "polish"
[[steps]]
task = "smooth"
strength = -1
""")
    env = dict(os.environ, PYTHONPATH=str(ROOT / "solver"), ISOCLAY_THREADS="1")
    done = subprocess.run([sys.executable, "-m", "isoclay.cli", "batch", str(plan), "--dry-run"],
                          env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 2
    lines = [line for line in done.stderr.splitlines() if line.strip()]
    assert len(lines) == 3, done.stderr
    assert all(line.startswith("isoclay: ") for line in lines)
    assert any("unknown task 'polish'" in line for line in lines)
    assert any("missing.ply: no such file" in line for line in lines)
    assert any("strength -1" in line and "pebble_00.ply" in line for line in lines)
    assert "nothing was run" in done.stdout
    assert not (tmp_path / "never").exists()


def test_dry_run_refuses_an_item_too_large_for_the_workers(library, tmp_path):
    from isoclay.batch.checks import check_item
    from isoclay.estimates import estimate_memory

    plan = load_plan(write_plan(library, str(tmp_path / "out")))
    item = next(i for i in plan.items if i.relative == "scans/clay_02.ply")
    ok = check_item(item, 64 * 2**30)
    assert ok.problems == () and ok.memory >= estimate_memory("remesh", ok.vertices, ok.faces, {"fit": {"resolution": 48}})
    refused = check_item(item, 2**30)  # 1 GiB workers: the torch runtime alone needs more (isoclay.estimates)
    assert len(refused.problems) == 1 and "needs about" in refused.problems[0] and "1.00 GiB" in refused.problems[0]


@pytest.mark.parametrize("text, words", [
    ("[inputs]\npaths = ['*.ply']\n[[steps]]\ntask = 'remesh'\n[outputs]\n", "unknown section [outputs]"),
    ("[inputs]\npaths = ['*.ply']\n[output]\nname = '{stem}.fbx'\n[[steps]]\ntask = 'remesh'\n", "must end in one of"),
    ("[inputs]\npaths = ['*.ply']\n[output]\nname = '{base}.ply'\n[[steps]]\ntask = 'remesh'\n", "unknown field {base}"),
    ("[inputs]\npaths = ['*.ply']\n", "no [[steps]]"),
    ("[inputs]\npaths = ['*.ply']\n[fit]\nresolution = 4\n[[steps]]\ntask = 'remesh'\n", "fit resolution 4 is out of range"),
    ("[inputs]\npaths = ['*.ply']\n[cluster]\nmemory_limit = 'lots'\n[[steps]]\ntask = 'remesh'\n", "give a size"),
    ("[inputs]\npaths = ['*.ply']\n[[steps]]\ntask = 'remesh'\n[[overrides]]\nmatch = 'a*'\nsmooth = {strength = 1}\n",
     "has no smooth step"),
    ("[inputs\n", "not valid TOML"),
])
def test_plan_validator_names_the_problem(tmp_path, text, words):
    from isoclay.batch.plan import PlanError

    (tmp_path / "a.ply").write_text("ply\n")
    path = tmp_path / "p.toml"
    path.write_text(text)
    with pytest.raises(PlanError) as caught:
        load_plan(path)
    assert any(words in line for line in caught.value.lines), caught.value.lines


def test_decimate_task_against_the_sphere_formula():
    """Decimating an icosphere (trimesh.creation.icosphere) keeps it closed and its volume within 2%
    of 4/3 pi r^3 (the sphere's volume formula; the 20k-face icosphere itself is 0.1% under it)."""
    from isoclay.errors import InvalidInput
    from isoclay.mesh.types import TriangleMesh
    from isoclay.tasks.decimate import Config, run

    sphere = trimesh.creation.icosphere(5, radius=0.5)
    mesh = TriangleMesh(np.array(sphere.vertices), np.array(sphere.faces, dtype=np.int64))
    out = run(None, mesh, Config.from_params({"target_faces": 2000}), lambda *a: None, lambda: False)
    result = trimesh.Trimesh(out.mesh.vertices, out.mesh.faces, process=False)
    assert len(result.faces) <= 2000 and result.is_watertight
    np.testing.assert_allclose(result.volume, 4 / 3 * np.pi * 0.5**3, rtol=0.02)
    for bad in ({"target_faces": 3}, {"target_faces": 2.5}, {}, {"target_faces": 100, "ratio": 0.5}, {"target_faces": True}):
        with pytest.raises(InvalidInput):
            Config.from_params(bad)


def test_readme_plan_example_is_a_valid_plan(tmp_path):
    """The plan shown in README "Cleaning a scan library" parses and checks as written."""
    import re

    text = (ROOT / "README.md").read_text().split("## Cleaning a scan library", 1)[1].split("\n## ", 1)[0]
    plan_text = re.findall(r"```toml\n(.+?)\n```", text, flags=re.S)[0]
    write_library(tmp_path / "scans", count=1)
    (tmp_path / "plan.toml").write_text(plan_text)
    plan = load_plan(tmp_path / "plan.toml")
    assert [s.task for s in plan.items[0].steps] == ["remesh", "smooth", "decimate"]
