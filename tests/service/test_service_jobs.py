"""Jobs through the wire: idempotent submission, progress, cancel, crashes, limits, bad meshes, two clients."""

from __future__ import annotations

import time

import numpy as np
import pytest

from service_support import admitted_dealer, fresh_id, icosphere, tetrahedron
from isoclay import wire
from isoclay.client import ClientError, JobFailed, RemoteError, SolverClient


def test_echo_round_trip_returns_the_same_mesh_bit_exact(client):
    v, f = icosphere(2)
    job = fresh_id()
    state = client.submit(job, "echo", {}, v.astype(np.float32), f, source_key="Jug")
    assert state["state"] == "done"
    rec = client.result(job)
    # float32 input is widened exactly (IEEE 754: every float32 is a float64).
    np.testing.assert_array_equal(rec.vertices, v.astype(np.float32).astype(np.float64))
    np.testing.assert_array_equal(rec.faces, f)


def test_submit_is_idempotent_on_job_id(client, live):
    v, f = tetrahedron()
    job = fresh_id()
    first = client.submit(job, "echo", {"delay_s": 0.0}, v, f, source_key="idem")
    again = client.submit(job, "echo", {"delay_s": 0.0}, v, f, source_key="idem")
    assert again["job_id"] == first["job_id"]
    assert client.wait(job, timeout_s=30)["state"] == "done"
    third = client.submit(job, "echo", {"delay_s": 0.0}, v, f, source_key="idem")
    assert third["state"] == "done"
    rows = live.server.store.db.execute("SELECT COUNT(*) FROM nodes WHERE job_id=?", (job,)).fetchone()[0]
    assert rows == 1
    assert len(client.history("idem")) == 1


def test_mesh_is_uploaded_only_when_the_server_lacks_it(client, live):
    v, f = icosphere(1)
    received = []
    original = live.server.jobs._store_mesh

    def spy(v, f, mesh_hash):
        received.append(len(v))
        return original(v, f, mesh_hash)

    live.server.jobs._store_mesh = spy
    try:
        client.wait(client.submit(fresh_id(), "echo", {"delay_s": 0.0}, v, f, source_key="upl")["job_id"], timeout_s=30)
        client.wait(client.submit(fresh_id(), "echo", {"delay_s": 0.0}, v, f, source_key="upl")["job_id"], timeout_s=30)
    finally:
        live.server.jobs._store_mesh = original
    assert received == [len(v)]  # the second submit named the hash and the server already had it


def test_progress_is_reported_at_most_ten_times_a_second(client):
    v, f = tetrahedron()
    job = fresh_id()
    client.submit(job, "echo", {"delay_s": 1.5, "steps": 300}, v, f, source_key="prog")
    seen = []
    state = client.wait(job, progress=lambda s: seen.append((time.monotonic(), s["fraction"])), timeout_s=30,
                        interval_s=0.01)
    assert state["state"] == "done"
    fractions = [fr for _, fr in seen if 0 < fr < 1]
    assert len(fractions) >= 5  # progress did arrive
    # 300 steps in 1.5 s would be 200 events per second unthrottled; the worker sends <= 10/s.
    running_span = seen[-1][0] - seen[0][0]
    assert len(fractions) <= 10 * running_span + 2


def test_cancel_stops_a_cooperative_job_within_two_seconds(client, live):
    v, f = tetrahedron()
    job = fresh_id()
    client.submit(job, "echo", {"delay_s": 30.0, "steps": 3000}, v, f, source_key="cancel")
    while client.poll(job)["stage"] in ("", "starting"):
        time.sleep(0.05)
    t0 = time.monotonic()
    client.cancel(job)
    state = client.wait(job, timeout_s=5, interval_s=0.02)
    assert state["state"] == "cancelled" and time.monotonic() - t0 < 2.0
    assert client.ping()["boot_id"] == live.server.boot_id  # still serving
    with pytest.raises(JobFailed):
        client.result(job)


def test_cancel_escalates_to_terminate_when_the_worker_ignores_it(client):
    v, f = tetrahedron()
    job = fresh_id()
    client.submit(job, "echo", {"delay_s": 60.0, "steps": 600, "ignore_cancel": True}, v, f, source_key="cancel")
    while client.poll(job)["stage"] in ("", "starting"):
        time.sleep(0.05)
    t0 = time.monotonic()
    client.cancel(job)
    state = client.wait(job, timeout_s=5, interval_s=0.02)
    assert state["state"] == "cancelled" and time.monotonic() - t0 < 2.0


@pytest.mark.parametrize("crash, fragment", [
    ("abort", "SIGABRT"), ("exit", "exit code 3"), ("raise", "deliberate failure"), ("memory", "memory"),
])
def test_crashed_worker_is_a_failed_job_with_its_reason_and_the_server_keeps_serving(client, crash, fragment):
    v, f = tetrahedron()
    job = fresh_id()
    client.submit(job, "echo", {"crash": crash, "steps": 4}, v, f, source_key="crash")
    state = client.wait(job, timeout_s=30, interval_s=0.05)
    assert state["state"] == "failed"
    assert fragment in state["error"] and "\n" not in state["error"]
    assert client.submit(fresh_id(), "echo", {}, v, f, source_key="crash")["state"] == "done"


def test_preflight_memory_estimate_refuses_a_job_too_big_for_the_limit(client):
    v, f = tetrahedron()
    with pytest.raises(RemoteError) as err:
        client.submit(fresh_id(), "remesh", {"fit": {"resolution": 2000}}, v, f, source_key="big")
    assert err.value.code == "invalid_input" and "GiB" in str(err.value)


def test_queue_is_bounded(tmp_path):
    from service_support import ServerThread

    srv = ServerThread(tmp_path, max_queue=2, max_workers=1)
    c = SolverClient(srv.connection, timeout_s=3, retries=0)
    try:
        v, f = tetrahedron()
        ids = [fresh_id() for _ in range(4)]
        for job in ids[:3]:  # one runs, two wait
            c.submit(job, "echo", {"delay_s": 20.0}, v, f, source_key="q")
        with pytest.raises(RemoteError) as err:
            c.submit(ids[3], "echo", {"delay_s": 20.0}, v, f, source_key="q")
        assert err.value.code == "busy"
        for job in ids[:3]:
            c.cancel(job)
        assert [c.wait(j, timeout_s=5)["state"] for j in ids[:3]] == ["cancelled"] * 3
    finally:
        c.close()
        srv.stop()


# The bad-mesh catalogue: each case must come back as one line naming the problem.
BAD_MESHES = {
    "no vertices": (np.zeros((0, 3)), np.zeros((0, 3), np.int64), "no vertices"),
    "no faces": (np.eye(3), np.zeros((0, 3), np.int64), "no triangles"),
    "nan": (np.array([[0, 0, 0], [np.nan, 0, 0], [0, 1, 0]]), np.array([[0, 1, 2]]), "NaN"),
    "inf": (np.array([[0, 0, 0], [1, 0, 0], [0, -np.inf, 0]]), np.array([[0, 1, 2]]), "infinite"),
    "index too large": (np.eye(3), np.array([[0, 1, 3]]), "face index 3"),
    "negative index": (np.eye(3), np.array([[0, -2, 1]]), "face index -2"),
    "quads": (np.eye(4)[:, :3], np.array([[0, 1, 2, 3]]), "shape (m, 3)"),
    "2d points": (np.zeros((3, 2)), np.array([[0, 1, 2]]), "shape (n, 3)"),
    "float faces": (np.eye(3), np.array([[0.0, 1.0, 2.0]]), "integers"),
}


@pytest.mark.parametrize("name", list(BAD_MESHES))
def test_bad_mesh_catalogue_through_the_client(client, name):
    v, f, fragment = BAD_MESHES[name]
    with pytest.raises(RemoteError) as err:
        client.submit(fresh_id(), "echo", {}, v, f, source_key="bad")
    assert err.value.code == "invalid_mesh" and fragment in str(err.value) and "\n" not in str(err.value)


@pytest.mark.parametrize("name", ["nan", "inf", "index too large", "negative index"])
def test_bad_mesh_catalogue_sent_raw_past_the_client_checks(live, name):
    # A client that skips its own checks: the server must refuse with the same one-line error.
    import zmq

    v, f, fragment = BAD_MESHES[name]
    v = np.ascontiguousarray(v, "<f8")
    f = np.ascontiguousarray(f, "<i4")
    ctx = zmq.Context()
    s = admitted_dealer(ctx, live.server.endpoint, live.server.key)
    try:
        body = {"job_id": fresh_id(), "task": "echo", "params": {}, "source_key": "raw", "parent_node": None,
                "mesh_hash": None}
        s.send_multipart(wire.encode(live.server.key, "submit", body, {"vertices": v, "faces": f}, session=wire.new_id(),
                                     seq=1, boot=live.server.boot_id))
        assert s.poll(5000)
        reply = wire.decode(live.server.key, s.recv_multipart(), wire.REPLIES)
    finally:
        s.close()
        ctx.term()
    assert reply.type == "error" and reply.body["code"] == "invalid_mesh" and fragment in reply.body["message"]


def test_bad_requests_get_named_errors(client):
    v, f = tetrahedron()
    cases = [
        (lambda: client.submit(fresh_id(), "explode", {}, v, f, source_key="x"), "unknown_task"),
        (lambda: client.submit(fresh_id(), "echo", {"colour": 1}, v, f, source_key="x"), "invalid_input"),
        (lambda: client.submit(fresh_id(), "echo", {"delay_s": -1}, v, f, source_key="x"), "invalid_input"),
        (lambda: client.poll("never-submitted"), "unknown_job"),
        (lambda: client.result("never-submitted"), "unknown_job"),
        (lambda: client.fetch_node("f" * 32), "unknown_node"),
        (lambda: client.submit(fresh_id(), "echo", {}, None, None, source_key="x", parent_node="e" * 32), "unknown_node"),
        (lambda: client.checkout("x", "e" * 32), "invalid_input"),
    ]
    for call, code in cases:
        with pytest.raises(RemoteError) as err:
            call()
        assert err.value.code == code, (code, str(err.value))
    with pytest.raises(ClientError):
        client.submit(fresh_id(), "echo", {}, None, None, source_key="x")  # neither mesh nor parent
    with pytest.raises(RemoteError) as err:
        client.submit("bad id with spaces", "echo", {}, v, f, source_key="x")
    assert err.value.code == "bad_message"


def test_result_of_a_running_job_is_not_ready(client):
    v, f = tetrahedron()
    job = fresh_id()
    client.submit(job, "echo", {"delay_s": 10.0}, v, f, source_key="nr")
    with pytest.raises(RemoteError) as err:
        client.result(job)
    assert err.value.code == "not_ready"
    client.cancel(job)
    client.wait(job, timeout_s=5)


def test_two_clients_at_once_and_a_client_that_vanishes_mid_job(live):
    v, f = icosphere(1)
    a = SolverClient(live.connection, timeout_s=3, retries=0)
    b = SolverClient(live.connection, timeout_s=3, retries=0)
    ja, jb, jc = fresh_id("a"), fresh_id("b"), fresh_id("c")
    a.submit(ja, "echo", {"delay_s": 0.5}, v, f, source_key="two-a")
    b.submit(jb, "echo", {"delay_s": 0.5}, v, f, source_key="two-b")
    b.submit(jc, "echo", {"delay_s": 0.5}, v, f, source_key="two-b")
    b.close()  # b disappears while its jobs are queued or running
    assert a.wait(ja, timeout_s=30)["state"] == "done"
    c = SolverClient(live.connection, timeout_s=3, retries=0)  # a new client sees b's finished work
    try:
        assert c.wait(jb, timeout_s=30)["state"] == "done"
        assert c.wait(jc, timeout_s=30)["state"] == "done"
        assert len(c.history("two-b")) == 2
        np.testing.assert_array_equal(c.result(jb).vertices, v)
    finally:
        a.close()
        c.close()


def test_poll_returns_quickly_even_when_the_server_is_gone(tmp_path):
    from service_support import ServerThread

    srv = ServerThread(tmp_path)
    c = SolverClient(srv.connection, timeout_s=0.5, retries=1, poll_timeout_s=0.05)
    v, f = tetrahedron()
    job = fresh_id()
    c.submit(job, "echo", {"delay_s": 30.0}, v, f, source_key="gone")
    srv.stop()
    t0 = time.monotonic()
    state = c.poll(job)
    assert time.monotonic() - t0 < 0.2 and state["stale"]
    with pytest.raises(ClientError):  # SolverUnreachable after timeout_s * (retries + 1) of silence
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline:
            c.poll(job)
            time.sleep(0.05)
    c.close()


def test_headless_remote_edit_helper(live, tmp_path):
    # What `isoclay smooth ... --connection-file F` uses: submit, follow progress, return the mesh.
    import argparse
    import json
    import os

    from isoclay.errors import InvalidInput, InvalidMesh
    from isoclay.mesh.types import TriangleMesh
    from isoclay.service.remote import add_remote_options, connection_from, remote_requested, run_remote_edit

    path = tmp_path / "c.json"
    path.write_text(json.dumps(live.connection))
    os.chmod(path, 0o600)
    parser = argparse.ArgumentParser()
    add_remote_options(parser)
    args = parser.parse_args(["--connection-file", str(path)])
    assert remote_requested(args) and not remote_requested(parser.parse_args([]))
    v, f = icosphere(1)
    seen = []
    out = run_remote_edit(connection_from(args), TriangleMesh(v, f), "echo", {"delay_s": 0.3}, source_key="cli",
                          progress=lambda stage, fr, info: seen.append(stage))
    np.testing.assert_array_equal(out.mesh.vertices, v)
    np.testing.assert_array_equal(out.mesh.faces, f)
    assert out.node_id and "echo" in seen
    with pytest.raises(InvalidMesh):
        run_remote_edit(connection_from(args), TriangleMesh(v * np.nan, f), "echo", {}, source_key="cli")
    with pytest.raises(InvalidInput):
        connection_from(parser.parse_args(["--connection-file", str(tmp_path / "missing.json")]))
    with pytest.raises(InvalidInput):
        connection_from(parser.parse_args(["--connection-file", str(path), "--endpoint", "http://x"]))


def test_worker_sanitises_progress_info_and_reports_for_the_wire():
    from isoclay.service.worker import _json_ready, _plain_info

    info = _plain_info({"loss": np.float64(0.5), "nan": float("nan"), "step": 3, "big": 2**60, "arr": np.zeros(3),
                        "name": "x" * 500, **{f"k{i}": i for i in range(20)}})
    assert info["step"] == 3 and info["name"] == "x" * 120
    assert "nan" not in info and "arr" not in info and "big" not in info and len(info) <= 8
    report = _json_ready({"a": np.float32(1.5), "b": float("inf"), "c": [np.int64(2), None], "d": {"e": object()}})
    assert report == {"a": 1.5, "c": [2, None], "d": {}}  # what JSON cannot carry is left out, lists keep places
    wire.check_body("job", {"job_id": "j", "state": "running", "stage": "s", "fraction": 0.5, "info": info,
                            "error": None, "node_id": None, "task": "t", "source_key": "s", "warnings": []}, wire.REPLIES)


def test_wall_clock_limit_ends_a_job_as_failed_with_the_reason(tmp_path):
    from service_support import ServerThread

    srv = ServerThread(tmp_path, time_s=1.0)
    c = SolverClient(srv.connection, timeout_s=3, retries=0)
    try:
        v, f = tetrahedron()
        job = fresh_id()
        c.submit(job, "echo", {"delay_s": 30.0}, v, f, source_key="slow")
        state = c.wait(job, timeout_s=20)
        assert state["state"] == "failed" and "time limit" in state["error"]
        assert c.ping()["running"] == 0
    finally:
        c.close()
        srv.stop()
