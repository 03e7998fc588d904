"""Bounds on every number a client or an administrator gives, refused at submit with one sane line, and a data
folder that never keeps what nothing needs (refused and failed uploads, unreferenced blobs) nor outgrows its cap."""

from __future__ import annotations

import os
import re
import subprocess
import sys
import time

import numpy as np
import pytest

from service_support import SOLVER, ServerThread, admitted_dealer, fresh_id, icosphere, tetrahedron
from isoclay import wire
from isoclay.bench.service import grid_mesh
from isoclay.client import RemoteError, SolverClient
from isoclay.errors import InvalidInput
from isoclay.history.blobs import pack_mesh
from isoclay.service.limits import MAX_HANDLE_GROUPS, MAX_HANDLE_POINTS


def _sane(text: str) -> bool:
    """One line, and no number written with eight or more digits in a row (e.g. 149011613726615928832.0 GiB)."""
    return "\n" not in text and not re.search(r"\d{8,}", text)


def _blob_files(server) -> set[str]:
    return {p.name for p in server.blobs.root.glob("??/*")}


@pytest.fixture(scope="module")
def warm(tmp_path_factory):
    """A server whose parameter checker has loaded the task modules."""
    srv = ServerThread(tmp_path_factory.mktemp("limits"))
    assert srv.server.jobs.checker.wait_ready(180)
    c = SolverClient(srv.connection, timeout_s=5.0, retries=1)
    yield srv, c
    c.close()
    srv.stop()


@pytest.mark.parametrize("setting, value", [
    ("steps", 10**9), ("steps", -1), ("steps", 2.5), ("steps", True), ("near_samples", 10**12), ("near_samples", 10),
    ("batch", 0), ("batch", 10**7), ("learning_rate", 0.0), ("learning_rate", 1e300), ("resolution", 8),
    ("resolution", 10**7), ("band", 0.0), ("eikonal_weight", -1.0), ("normal_weight", float("inf")), ("seed", -1),
    ("architecture", "voxels"),
])
def test_fit_settings_outside_their_range_are_refused_with_one_sane_line(setting, value):
    from isoclay.field.fit import FitConfig

    with pytest.raises(InvalidInput) as err:
        FitConfig(**{setting: value}).validated()
    assert _sane(str(err.value)) and setting in str(err.value)


def test_fit_settings_at_the_ends_of_their_ranges_are_accepted():
    from isoclay.field.fit import FitConfig

    for config in (FitConfig(), FitConfig(resolution=1024, steps=100_000, batch=65_536, near_samples=5_000_000),
                   FitConfig(resolution=16, steps=0, batch=256, near_samples=1_000, learning_rate=0.1, band=0.5)):
        assert config.validated() == config


@pytest.mark.parametrize("target, ok", [(0, True), (4, True), (20_000_000, True), (3, False), (10**15, False)])
def test_remesh_target_faces_range(target, ok):
    from isoclay.tasks.remesh import Config

    if ok:
        assert Config.from_params({"target_faces": target}).target_faces == target
    else:
        with pytest.raises(InvalidInput) as err:
            Config.from_params({"target_faces": target})
        assert "out of range" in str(err.value) and _sane(str(err.value))


def test_serve_options_outside_their_range_are_refused_with_one_line(tmp_path):
    import argparse

    from isoclay.service.launch import add_arguments, check_options

    parser = argparse.ArgumentParser()
    add_arguments(parser)
    check_options(parser.parse_args([]))  # the defaults are inside every range
    for argv in (["--workers", "0"], ["--queue", "100000"], ["--memory-limit", "0.1"], ["--time-limit", "1e300"],
                 ["--cache-size", "-1"], ["--data-limit", "nan"], ["--job-threads", "1000"]):
        with pytest.raises(InvalidInput) as err:
            check_options(parser.parse_args(argv))
        assert argv[0] in str(err.value) and _sane(str(err.value))
    done = subprocess.run([sys.executable, "-P", "-m", "isoclay.service.server", "--time-limit", "1e300",
                           "--data-dir", str(tmp_path / "d"), "--connection-file", str(tmp_path / "c.json")],
                          capture_output=True, text=True, timeout=60, env=dict(os.environ, PYTHONPATH=str(SOLVER)))
    assert done.returncode == 2 and done.stderr.strip().count("\n") == 0 and "1e+300 is out of range" in done.stderr


@pytest.mark.parametrize("task, params, words", [
    ("remesh", {"target_faces": 10**15, "fit": {"resolution": 16}}, "target_faces 1e+15 is out of range"),
    ("remesh", {"fit": {"steps": 10**9, "resolution": 16}}, "fit steps 1e+09 is out of range"),
    ("remesh", {"fit": {"near_samples": 10**12, "resolution": 16}}, "fit near_samples 1e+12 is out of range"),
    ("remesh", {"fit": {"resolution": 10**7}}, "fit resolution 10,000,000 is out of range"),
    ("remesh", {"fit": {"resolution": 1024}}, "memory"),  # valid, but the fine grid's worst case is past 2 GiB
    ("remesh", {"fit": {"colour": 1}}, "unknown fit setting"),
    ("smooth", {"strength": -1.0}, "strength"),  # the task's own Config.from_params, run at submit
    ("deform", {"stiffness": "firm"}, "handle"),
])
def test_bad_parameters_are_refused_at_submit_and_leave_nothing_behind(warm, task, params, words):
    srv, c = warm
    v, f = icosphere(1)
    v = v + np.random.default_rng(len(words)).random(3)  # a mesh the server has never seen
    before = _blob_files(srv.server)
    job = fresh_id()
    with pytest.raises(RemoteError) as err:
        c.submit(job, task, params, v, f, source_key="bounds")
    assert err.value.code == "invalid_input" and words in str(err.value) and _sane(str(err.value)), str(err.value)
    assert srv.server.store.job(job) is None  # no job, so no history entry later either
    assert _blob_files(srv.server) == before  # the upload was never written
    assert srv.server.store.mesh_blob(wire.mesh_hash(v, f)) is None


def _raw_submit(srv, task: str, params: dict, arrays: dict):
    import zmq

    v, f = wire.canonical_mesh(*tetrahedron())
    body = {"job_id": fresh_id(), "task": task, "params": params, "source_key": "raw", "parent_node": None,
            "mesh_hash": None}
    ctx = zmq.Context()
    sock = admitted_dealer(ctx, srv.server.endpoint, srv.server.key)
    try:
        sock.send_multipart(wire.encode(srv.server.key, "submit", body, {"vertices": v, "faces": f, **arrays},
                                        session=wire.new_id(), seq=1, boot=srv.server.boot_id))
        assert sock.poll(10_000)
        return wire.decode(srv.server.key, sock.recv_multipart(), wire.REPLIES)
    finally:
        sock.close()
        ctx.term()


def test_handle_counts_are_bounded_at_submit(warm):
    srv, _ = warm
    groups = MAX_HANDLE_GROUPS + 1
    reply = _raw_submit(srv, "deform", {"groups": [{"transform": np.eye(4).tolist()}] * groups},
                        {f"handles:{i}": np.zeros((1, 3)) for i in range(groups)})
    assert reply.body["code"] == "invalid_input" and f"{groups} handle groups" in reply.body["message"]
    reply = _raw_submit(srv, "deform", {"groups": [{"transform": np.eye(4).tolist()}]},
                        {"handles:0": np.zeros((MAX_HANDLE_POINTS + 1, 3))})
    assert reply.body["code"] == "invalid_input" and "handle points" in reply.body["message"]
    assert _sane(reply.body["message"])


def test_failed_uploads_and_unreferenced_blobs_are_removed(warm):
    srv, c = warm
    server = srv.server
    v, f = tetrahedron()
    kept = c.submit(fresh_id(), "echo", {"delay_s": 0.0}, v, f, source_key="kept")["job_id"]
    kept_node = c.wait(kept, timeout_s=30)["node_id"]
    orphan = server.blobs.put_bytes(b"a result whose commit never happened")
    os.utime(server.blobs.path(orphan), (time.time() - 3600, time.time() - 3600))
    fresh = v * 3.0
    job = c.submit(fresh_id(), "echo", {"crash": "raise", "steps": 4}, fresh, f, source_key="fails")["job_id"]
    assert c.wait(job, timeout_s=30)["state"] == "failed"
    deadline = time.monotonic() + 10
    while orphan in _blob_files(server) and time.monotonic() < deadline:  # collected once nothing runs
        time.sleep(0.05)
    assert server.store.mesh_blob(wire.mesh_hash(fresh, f)) is None
    assert orphan not in _blob_files(server)
    assert _blob_files(server) == server.store.referenced_blobs() & _blob_files(server)
    np.testing.assert_array_equal(c.fetch_node(kept_node).vertices, v)  # history untouched
    again = c.submit(fresh_id(), "echo", {"delay_s": 0.0}, fresh, f, source_key="fails")["job_id"]  # re-uploads
    assert c.wait(again, timeout_s=30)["state"] == "done"


def test_the_data_folder_cap_evicts_cached_fields_oldest_first(tmp_path):
    srv = ServerThread(tmp_path)
    c = SolverClient(srv.connection, timeout_s=5, retries=0)
    try:
        data = srv.server.jobs.data
        cache = srv.server.jobs.cache_root
        cache.mkdir(exist_ok=True)
        entries = []
        for i in range(3):
            path = cache / f"{i:064x}.pt"
            path.write_bytes(os.urandom(1 << 20))
            os.utime(path, (1000.0 + i, 1000.0 + i))  # entry 0 least recently used
            entries.append(path)
        v, f = grid_mesh(30_000)  # stored as 24 bytes per vertex and per face: 2.1 MiB
        data.max_bytes = data.usage() + (1 << 20)  # room for 1 MiB more: two cached fields must go
        job = c.submit(fresh_id(), "echo", {"delay_s": 0.0}, v, f, source_key="cap")["job_id"]
        assert c.wait(job, timeout_s=30)["state"] == "done"
        assert [p.exists() for p in entries] == [False, False, True]  # the two oldest went, the newest stayed
        assert data.usage() <= data.max_bytes
        big_v, big_f = grid_mesh(200_000)
        with pytest.raises(RemoteError) as err:
            c.submit(fresh_id(), "echo", {"delay_s": 0.0}, big_v, big_f, source_key="cap")
        assert "--data-limit" in str(err.value) and _sane(str(err.value))
        assert srv.server.store.mesh_blob(wire.mesh_hash(big_v, big_f)) is None
    finally:
        c.close()
        srv.stop()
