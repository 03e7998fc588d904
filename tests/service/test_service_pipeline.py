"""Real edits through the service (worker processes running the lead's pipeline): remesh, cache, branch, cancel."""

from __future__ import annotations

import time

import numpy as np
import pytest

from service_support import ServerThread, fresh_id, icosphere
from isoclay.client import SolverClient
from isoclay.history.blobs import pack_mesh

pytest.importorskip("isoclay.pipeline")

SMALL_FIT = {"resolution": 32, "steps": 0}


@pytest.fixture(scope="module")
def pipe(tmp_path_factory):
    srv = ServerThread(tmp_path_factory.mktemp("pipe"), memory_bytes=6 << 30, threads=1)
    yield srv
    srv.stop()


@pytest.fixture(scope="module")
def solver(pipe):
    c = SolverClient(pipe.connection, timeout_s=5.0, retries=1)
    yield c
    c.close()


def _wait_for_stage(c, job, stages, limit_s=60):
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline:
        s = c.poll(job)
        if s["stage"] in stages or s["state"] not in ("queued", "running"):
            return s
        time.sleep(0.02)
    raise AssertionError(f"job {job} never reached {stages}")


def test_remesh_end_to_end_then_cache_hit_then_branch(pipe, solver):
    v, f = icosphere(3)  # trimesh.creation.icosphere, radius 1
    job = fresh_id("remesh")
    solver.submit(job, "remesh", {"resolution": 32, "fit": SMALL_FIT}, v, f, source_key="Stone")
    state = solver.wait(job, timeout_s=120)
    assert state["state"] == "done", state["error"]
    rec = solver.result(job)
    # Analytic sphere (distance from the centre = radius 1): marching cubes on a 32-cell grid over
    # the diameter 2 lands within a fraction of a cell (1/16); tolerance 0.03 (1.5% of the diameter).
    radius = np.linalg.norm(rec.vertices, axis=1)
    np.testing.assert_allclose(radius, 1.0, atol=0.03)
    assert rec.faces.shape[1] == 3 and rec.faces.max() < len(rec.vertices)
    assert rec.report["watertight"] and "fit" in rec.report["seconds"] and not rec.report["field_cache_hit"]
    assert [n["id"] for n in solver.history("Stone")] == [rec.node_id]

    # A second edit of the same mesh with the same fit settings starts from the cached field.
    again = fresh_id("remesh")
    solver.submit(again, "remesh", {"resolution": 24, "fit": SMALL_FIT}, v, f, source_key="Stone")
    assert solver.wait(again, timeout_s=120)["state"] == "done"
    second = solver.result(again)
    assert second.report["field_cache_hit"] and "fit" not in second.report["seconds"]

    # Branching from the first node: no mesh sent, the edit starts from that node's field and result.
    branch = fresh_id("branch")
    solver.branch_from(rec.node_id, branch, "remesh", {"resolution": 24}, "Stone")
    assert solver.wait(branch, timeout_s=120)["state"] == "done"
    third = solver.result(branch)
    assert "fit" not in third.report["seconds"]
    nodes = solver.history("Stone")
    assert nodes[-1]["parent"] == rec.node_id and nodes[-1]["current"]
    np.testing.assert_allclose(np.linalg.norm(third.vertices, axis=1), 1.0, atol=0.04)

    # CONTRACTS 7: a deform keeps no result field; an edit from its node must fit the node's result mesh,
    # not reuse the field of the shape before it. Make the branch's node look so: shrunk, no result field.
    server = pipe.server
    shrunk = server.blobs.put_bytes(pack_mesh(third.vertices * 0.5, third.faces))
    server.store.db.execute("UPDATE nodes SET result_field_blob=NULL, result_blob=? WHERE node_id=?",
                            (shrunk, third.node_id))
    after = fresh_id("branch")
    solver.branch_from(third.node_id, after, "remesh", {"resolution": 24, "fit": SMALL_FIT}, "Stone")
    assert solver.wait(after, timeout_s=120)["state"] == "done"
    fourth = solver.result(after)
    assert "fit" in fourth.report["seconds"]  # fitted afresh from the node's result
    # Analytic sphere of radius 0.5 now; a 24-cell grid over the diameter 1 lands within a cell (1/24).
    np.testing.assert_allclose(np.linalg.norm(fourth.vertices, axis=1), 0.5, atol=0.045)


def test_bad_task_parameters_fail_the_job_with_one_line_while_the_checker_loads(pipe, solver, monkeypatch):
    # Submit-time refusals: test_service_limits.py. In the first seconds after a start the checker is
    # still loading; the job is then queued unchecked and its worker refuses it with the same line.
    monkeypatch.setattr(pipe.server.jobs.checker, "ready", lambda: False)
    v, f = icosphere(1)
    job = fresh_id("bad")
    solver.submit(job, "remesh", {"resolution": 3, "fit": SMALL_FIT}, v, f, source_key="Bad")
    state = solver.wait(job, timeout_s=120)
    assert state["state"] == "failed" and "resolution" in state["error"] and "\n" not in state["error"]
    job = fresh_id("bad")
    solver.submit(job, "remesh", {"fit": {"colour": 1}}, v, f, source_key="Bad")
    state = solver.wait(job, timeout_s=120)
    assert state["state"] == "failed" and "fit setting" in state["error"]


@pytest.mark.parametrize("params, stages", [
    ({"resolution": 32, "fit": {"resolution": 48, "steps": 100_000}}, ("refine",)),  # during the fit
    ({"resolution": 1024, "fit": {"resolution": 24, "steps": 0}}, ("extract",)),  # during the edit
])
def test_cancel_during_fit_and_during_edit_within_two_seconds(solver, params, stages):
    v, f = icosphere(3)
    v = v * (1.0 + 0.01 * len(stages[0]))  # a mesh of its own: no cache hit from other tests
    job = fresh_id("cancel")
    solver.submit(job, "remesh", params, v, f, source_key="Cancel")
    state = _wait_for_stage(solver, job, stages)
    assert state["state"] == "running", state
    t0 = time.monotonic()
    solver.cancel(job)
    final = solver.wait(job, timeout_s=5, interval_s=0.02)
    assert final["state"] == "cancelled" and time.monotonic() - t0 < 2.0
    assert solver.ping()["running"] == 0
