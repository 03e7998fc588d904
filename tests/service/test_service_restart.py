"""Crashes and restarts: kill -9 at random moments loses no acknowledged edit; clients notice and resubmit."""

from __future__ import annotations

import time

from pathlib import Path

from service_support import ServerProcess, fresh_id, plant_modules, planted_markers, tetrahedron
from isoclay.bench.service import check_store, kill9_cycles
from isoclay.client import SolverClient


def test_kill9_cycles_lose_no_acknowledged_edit(tmp_path):
    # 200 cycles run in the benchmark; a handful here.
    out = kill9_cycles(4, seed=3, workdir=tmp_path)
    assert out["cycles"] == 4
    assert out["lost_acknowledged"] == 0
    assert out["duplicate_nodes"] == 0
    assert out["integrity_failures"] == 0
    assert out["corrupt_blobs"] == 0
    assert "unfinished" not in out  # every interrupted job was resumed to completion
    assert out["history_nodes"] == out["submitted"]  # one node per job, none lost, none doubled
    assert out["acknowledged"] > 0 and out["kills_with_jobs_in_flight"] >= 1


def test_server_restart_mid_job_is_noticed_and_the_job_resumes_idempotently(tmp_path):
    srv = ServerProcess(tmp_path)
    info = srv.start()
    c = SolverClient(str(srv.connection), timeout_s=1.0, retries=2)
    try:
        v, f = tetrahedron()
        job = fresh_id()
        first_boot = c.ping()["boot_id"]
        c.submit(job, "echo", {"delay_s": 2.0, "steps": 40}, v, f, source_key="restart")
        while c.poll(job)["fraction"] <= 0:
            time.sleep(0.05)
        srv.kill9()
        state = c.poll(job)
        assert state["stale"]  # the server is gone: poll answers at once from its cache
        info2 = srv.start()
        assert info2["endpoint"] == info["endpoint"] and info2["key"] == info["key"]  # same file, new boot
        assert info2["boot_id"] != first_boot
        # Resubmit straight away (no ping first): the stale boot id is refused, the client re-pings and resends.
        state = c.submit(job, "echo", {"delay_s": 2.0, "steps": 40}, v, f, source_key="restart")
        assert c.server_restarted and c.boot_id == info2["boot_id"]
        assert state["state"] in ("queued", "running")
        assert c.wait(job, timeout_s=30)["state"] == "done"
        assert len(c.history("restart")) == 1
    finally:
        c.close()
        srv.stop()
    report = check_store(srv.data)
    assert report["integrity"] == "ok" and report["duplicate_nodes"] == 0 and report["corrupt_blobs"] == 0


def test_interrupted_jobs_are_listed_as_interrupted_after_a_crash(tmp_path):
    srv = ServerProcess(tmp_path)
    srv.start()
    c = SolverClient(str(srv.connection), timeout_s=2.0, retries=1)  # polls wait out the restart (~1-2 s)
    try:
        v, f = tetrahedron()
        job = fresh_id()
        c.submit(job, "echo", {"delay_s": 20.0}, v, f, source_key="intr")
        srv.kill9()
        srv.start()
        state = c.poll(job)
        while state["stale"]:
            state = c.poll(job)
        assert state["state"] == "interrupted" and "resubmit" in state["error"]
        assert c.server_restarted
        c.cancel(job)  # an interrupted job can also be left alone; cancel does not resurrect it
        assert c.poll(job)["state"] == "interrupted"
        assert c.resume(job)["state"] in ("queued", "running")  # or resumed explicitly
        c.cancel(job)
        assert c.wait(job, timeout_s=10)["state"] == "cancelled"
    finally:
        c.close()
        srv.stop()


def test_isoclay_serve_through_the_cli_and_graceful_stop(tmp_path):
    # `isoclay serve` as users start it; SIGTERM stops it and a running job becomes interrupted.
    import json
    import os
    import signal
    import subprocess
    import sys

    from service_support import SOLVER

    conn = tmp_path / "run" / "solver.json"
    env = dict(os.environ, PYTHONPATH=str(SOLVER))
    import argparse

    from isoclay.commands import serve

    parser = argparse.ArgumentParser()
    serve.add_arguments(parser)
    assert serve.run(parser.parse_args(["--new-key", "anna", "--keys-dir", str(tmp_path / "keys")]), None) == 0
    assert (tmp_path / "keys" / "anna.key_secret").exists()
    bad = subprocess.run([sys.executable, "-m", "isoclay.cli", "serve", "--endpoint", "tcp://0.0.0.0:5599",
                          "--data-dir", str(tmp_path / "d0")], env=env, capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and "CURVE" in bad.stderr and len(bad.stderr.strip().splitlines()) == 1
    # The console script, as artists run it, from a folder holding modules named like standard ones:
    # it re-executes itself without torch, and neither that server nor its workers import them.
    script = Path(sys.executable).with_name("isoclay")
    command = [str(script)] if script.exists() else [sys.executable, "-P", "-m", "isoclay.cli"]
    folder = plant_modules(tmp_path / "studio")
    proc = subprocess.Popen([*command, "serve", "--data-dir", str(tmp_path / "d"), "--connection-file", str(conn),
                             "--test-params"], env=env, cwd=folder,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 60
        while not conn.exists() and time.monotonic() < deadline:
            time.sleep(0.05)
        c = SolverClient(json.loads(conn.read_text()), timeout_s=3, retries=1)
        c.ping()
        maps = open(f"/proc/{proc.pid}/maps").read() if os.path.exists(f"/proc/{proc.pid}/maps") else ""
        assert "libtorch" not in maps  # the server process stays free of torch (workers import it)
        v, f = tetrahedron()
        c.submit("cli-job", "echo", {"delay_s": 30.0}, v, f, source_key="cli")
        while c.poll("cli-job")["stage"] in ("", "starting"):  # the worker is running its own code
            time.sleep(0.05)
        c.close()
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=20) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stderr.close()
    assert planted_markers(folder) == []
    from isoclay.history.store import HistoryStore

    store = HistoryStore(tmp_path / "d" / "history.sqlite3")
    assert store.job("cli-job").state == "interrupted"
    store.close()


def test_watch_stdin_stops_the_server_when_the_parent_goes(tmp_path):
    import json
    import os
    import subprocess
    import sys

    from service_support import SOLVER

    conn = tmp_path / "run" / "solver.json"
    proc = subprocess.Popen([sys.executable, "-m", "isoclay.service.server", "--data-dir", str(tmp_path / "d"),
                             "--connection-file", str(conn), "--watch-stdin"], stdin=subprocess.PIPE,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            env=dict(os.environ, PYTHONPATH=str(SOLVER)))
    try:
        deadline = time.monotonic() + 30
        while not conn.exists() and time.monotonic() < deadline:
            time.sleep(0.05)
        c = SolverClient(json.loads(conn.read_text()), timeout_s=3, retries=0)
        assert c.ping()["running"] == 0
        c.close()
        proc.stdin.close()  # the parent (Blender) went away
        assert proc.wait(timeout=10) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
