"""The solver's processes: nothing from the starting folder runs, files are private, memory from strangers is
bounded, a worker's death is explained honestly, and a job id cannot be reused for another edit."""

from __future__ import annotations

import ast
import os
import signal
import stat
import time

import pytest

from service_support import (SOLVER, ServerLauncher, ServerThread, fresh_id, icosphere, plant_modules,
                             planted_markers, tetrahedron)
from isoclay.bench.service import message_memory
from isoclay.client import RemoteError, SolverClient
from isoclay.service.crashes import Evidence, crash_reason

#: Long enough for the server to have read a worker's peak memory once (jobs.RSS_SAMPLE_S is 0.5 s).
RSS_WAIT_S = 0.7


@pytest.fixture(scope="module")
def planted_server(tmp_path_factory):
    """A solver started the plain way (`python -m`, no -P) from a folder holding planted modules,
    after two jobs: an echo (a light worker) and a small remesh (a worker importing torch, numpy, libigl)."""
    root = tmp_path_factory.mktemp("planted")
    folder = plant_modules(root / "studio")
    srv = ServerLauncher(root / "solver", cwd=folder, safe_path=False)
    info = srv.start()
    client = SolverClient(info, timeout_s=5.0, retries=1)
    v, f = icosphere(2)
    echo = client.submit(fresh_id(), "echo", {"delay_s": 0.0}, v, f, source_key="planted")["job_id"]
    remesh = client.submit(fresh_id(), "remesh", {"resolution": 16, "fit": {"resolution": 16}}, v, f,
                           source_key="planted")["job_id"]
    states = [client.wait(job, timeout_s=180) for job in (echo, remesh)]
    yield srv, states, folder
    client.close()
    srv.stop()


def test_modules_planted_in_the_starting_folder_are_never_imported(planted_server):
    # `python -m isoclay.service.server` without -P restarts itself with it before importing anything;
    # `isoclay serve` (the console script) is covered in test_service_restart.py
    srv, states, folder = planted_server
    assert [s["state"] for s in states] == ["done", "done"], [s["error"] for s in states]
    assert planted_markers(folder) == []


def test_every_file_the_solver_writes_is_private(planted_server):
    srv, _, _ = planted_server
    names, bad = set(), []
    for path in srv.data.rglob("*"):
        mode = stat.S_IMODE(path.lstat().st_mode)
        names.add(path.name)
        if mode != (0o700 if path.is_dir() else 0o600):
            bad.append(f"{path.relative_to(srv.data)} {mode:o}")
    assert bad == []
    # SQLite's side files exist while the server runs; the fixture's remesh left a cached field
    assert {"history.sqlite3", "history.sqlite3-wal", "history.sqlite3-shm"} <= names
    assert list((srv.data / "cache").glob("*.pt"))


def test_a_huge_message_from_a_stranger_costs_the_server_no_memory(tmp_path):
    # 1 GiB in eight 128 MiB frames from a peer that never read the connection file (3 GiB: isoclay bench)
    out = message_memory(1.0, workdir=tmp_path, wait_s=3.0)
    assert out["queued"] and not out["replied"]  # refused in the handshake: not a byte of it was read
    assert out["peak_rise_mib"] is None or out["peak_rise_mib"] <= 300
    assert out["rise_after_mib"] <= 64 and out["server_answers_after"]


def test_a_worker_that_dies_says_why(client):
    v, f = tetrahedron()
    for crash, words in (("exit", "deliberate exit for a test"), ("abort", "Fatal Python error: Aborted")):
        job = client.submit(fresh_id(), "echo", {"crash": crash, "steps": 4}, v, f, source_key="why")["job_id"]
        state = client.wait(job, timeout_s=30)
        assert state["state"] == "failed" and words in state["error"], state["error"]


def test_a_worker_killed_from_outside_is_not_blamed_on_memory(live, client):
    v, f = tetrahedron()
    job = client.submit(fresh_id(), "echo", {"delay_s": 30.0, "steps": 300}, v, f, source_key="killed")["job_id"]
    while client.poll(job)["stage"] in ("", "starting"):
        time.sleep(0.05)
    time.sleep(RSS_WAIT_S)
    os.kill(live.server.jobs.live[job].process.pid, signal.SIGKILL)  # an administrator's kill, not the kernel's
    error = client.wait(job, timeout_s=20)["error"]
    assert "SIGKILL" in error and "not for lack of memory" in error and "most likely" not in error


def test_a_sigkill_is_blamed_on_memory_only_with_evidence():
    limit = 2 << 30
    assert "ran out of memory" in crash_reason(-9, limit, Evidence(True, 300 << 20, 1))  # the kernel's OOM count rose
    assert "most likely for memory" in crash_reason(-9, limit, Evidence(True, int(0.95 * limit), 0))
    assert "not for lack of memory" in crash_reason(-9, limit, Evidence(True, 300 << 20, 0))
    assert "cannot tell" in crash_reason(-9, limit, Evidence(True, None, None))  # no /proc: says so
    assert "could not start" in crash_reason(1, limit, Evidence(False))


def test_an_interrupted_job_id_cannot_be_reused_for_another_edit(tmp_path):
    v, f = tetrahedron()
    job = fresh_id()
    first = ServerThread(tmp_path)
    c = SolverClient(first.connection, timeout_s=3, retries=0)
    c.submit(job, "echo", {"delay_s": 30.0}, v, f, source_key="resub")
    c.close()
    first.stop()  # the job was running: it is now interrupted
    second = ServerThread(tmp_path)
    c = SolverClient(second.connection, timeout_s=3, retries=0)
    try:
        assert c.poll(job)["state"] == "interrupted"
        with pytest.raises(RemoteError) as err:
            c.submit(job, "echo", {"delay_s": 0.1}, v, f, source_key="resub")
        assert "differs in its parameters" in str(err.value) and "fresh job id" in str(err.value)
        with pytest.raises(RemoteError):
            c.submit(job, "echo", {"delay_s": 30.0}, v * 2, f, source_key="resub")  # another mesh
        assert c.poll(job)["state"] == "interrupted"  # nothing ran
        assert c.submit(job, "echo", {"delay_s": 30.0}, v, f, source_key="resub")["state"] in ("queued", "running")
        c.cancel(job)
        assert c.wait(job, timeout_s=10)["state"] == "cancelled"
    finally:
        c.close()
        second.stop()


def test_the_server_does_not_import_the_command_line():
    for path in (SOLVER / "isoclay" / "service").glob("*.py"):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom):
                module = ("." * node.level) + (node.module or "")
                assert "commands" not in module.split("."), f"{path.name} imports {module}"
            elif isinstance(node, ast.Import):
                assert not any(a.name.startswith("isoclay.commands") for a in node.names), path.name
