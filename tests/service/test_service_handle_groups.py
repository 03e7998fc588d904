"""Deform handle groups over the wire: points as handles:<i> frames, kept as one blob, restored in the worker.

And the result correspondence (source_face / source_bary) stored with a result and returned by
result and fetch_node. References: numpy equality (the worker must see the very arrays sent) and
trimesh.proximity.closest_point (the closest point of the input surface, reference library).
"""

from __future__ import annotations

import numpy as np
import pytest

from service_support import ServerThread, fresh_id, icosphere
from isoclay.client import RemoteError, SolverClient
from isoclay.history.blobs import BlobStore
from isoclay.service import handle_groups

IDENTITY = [[1.0, 0, 0, 0], [0, 1.0, 0, 0], [0, 0, 1.0, 0], [0, 0, 0, 1.0]]


@pytest.fixture(scope="module")
def solver(tmp_path_factory):
    srv = ServerThread(tmp_path_factory.mktemp("groups"), memory_bytes=6 << 30, threads=1)
    c = SolverClient(srv.connection, timeout_s=5.0, retries=1)
    yield srv, c
    c.close()
    srv.stop()


def test_a_44k_point_selection_reaches_the_worker_exactly(solver):
    srv, c = solver
    rng = np.random.default_rng(5)
    groups = [rng.normal(size=(44_000, 3)), rng.normal(size=(7, 3))]  # beyond the header's 100k-item cap as lists
    v, f = icosphere(1)
    job = fresh_id("echo")
    params = {"delay_s": 0.0, "steps": 1, "groups": [{"transform": IDENTITY, "name": "rim"}, {"transform": IDENTITY}]}
    c.submit(job, "echo", params, v, f, source_key="Jug", arrays={f"handles:{i}": g for i, g in enumerate(groups)})
    assert c.wait(job, timeout_s=60)["state"] == "done"
    metrics = c.result(job).metrics
    # the worker's copy: same count and the same float64 sum bit for bit (numpy's own pairwise sum)
    assert metrics["handle_groups"] == 2 and metrics["handle_points"] == 44_007
    assert metrics["handle_sum"] == float(np.concatenate(groups).sum())
    # stored: the points live in one blob named by the parameters, not in the parameters
    row = srv.server.store.job(job)
    blob = row.params[handle_groups.BLOB_KEY]
    assert "points" not in row.params["groups"][0] and row.params["groups"][0]["name"] == "rim"
    restored = handle_groups.restore_points(row.params, BlobStore(srv.server.blobs.root))
    for got, sent in zip(restored["groups"], groups):
        np.testing.assert_array_equal(got["points"], sent)
        assert got["points"].dtype == np.float64 and got["points"].flags.writeable
    assert handle_groups.BLOB_KEY not in restored and row.params[handle_groups.BLOB_KEY] == blob  # stored row intact


@pytest.mark.parametrize("problem, words", [
    ("no groups", "params.groups is missing"),
    ("one frame short", "2 groups but the handle frames are 1"),
    ("inline points too", "inline points and a frame"),
    ("flat points", "send (k, 3) float64 points"),
    ("not finite", "NaN or infinite"),
])
def test_groups_and_frames_that_do_not_match_are_refused_at_submit(solver, problem, words):
    _, c = solver
    v, f = icosphere(1)
    pts = np.zeros((3, 3))
    groups = [{"transform": IDENTITY}, {"transform": IDENTITY}]
    arrays = {"handles:0": pts, "handles:1": pts}
    params = {"delay_s": 0.0, "steps": 1, "groups": groups}
    if problem == "no groups":
        params.pop("groups")
    elif problem == "one frame short":
        arrays.pop("handles:1")
    elif problem == "inline points too":
        groups[1] = {"transform": IDENTITY, "points": [[0.0, 0.0, 0.0]]}
    elif problem == "flat points":
        arrays["handles:1"] = np.zeros((3, 2))
    elif problem == "not finite":
        arrays["handles:1"] = np.array([[0.0, np.nan, 0.0]])
    job = fresh_id("bad")
    with pytest.raises(RemoteError) as err:
        c.submit(job, "echo", params, v, f, source_key="Jug", arrays=arrays)
    assert err.value.code == "invalid_input" and words in str(err.value) and "\n" not in str(err.value)
    with pytest.raises(RemoteError, match="no job"):
        c.poll(job)  # nothing was queued


def test_remeshed_result_carries_its_source_points(solver):
    import trimesh

    _, c = solver
    v, f = icosphere(2)
    v = v * [1.0, 0.8, 0.6] + [0.3, 0.0, -0.2]  # an ellipsoid off the origin, so world units are exercised
    job = fresh_id("remesh")
    c.submit(job, "remesh", {"resolution": 24, "fit": {"resolution": 24, "steps": 0}}, v, f, source_key="Stone")
    assert c.wait(job, timeout_s=120)["state"] == "done"
    for record in (c.result(job), c.fetch_node(c.poll(job)["node_id"])):
        face, bary = record.source_face, record.source_bary
        assert face.shape == (len(record.vertices),) and bary.shape == (len(record.vertices), 3)
        assert face.min() >= 0 and face.max() < len(f)
        np.testing.assert_allclose(bary.sum(axis=1), 1.0, atol=1e-6)
        assert bary.min() >= 0.0
        source = np.einsum("ij,ijk->ik", bary.astype(np.float64), v[f[face]])
        # the closest point of the input surface to each result vertex: no farther than
        # trimesh.proximity.closest_point finds (bary are float32: 1e-6 of the diagonal), and the same
        # point almost everywhere (trimesh's candidate search misses the best triangle now and then)
        closest, distance, _ = trimesh.proximity.closest_point(trimesh.Trimesh(v, f, process=False), record.vertices)
        diag = np.linalg.norm(np.ptp(v, axis=0))
        ours = np.linalg.norm(source - record.vertices, axis=1)
        assert (ours <= distance + 1e-6 * diag).all(), (ours - distance).max()
        same = np.linalg.norm(source - closest, axis=1) <= 1e-6 * diag
        assert same.mean() >= 0.95, same.mean()  # 98% measured
    history = c.history("Stone")
    assert history[-1]["summary"] == "surface detail 24"
