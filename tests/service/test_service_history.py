"""Edit history (SQLite WAL + content-addressed blobs) and the fitted-field cache."""

from __future__ import annotations

import hashlib
import os
import sqlite3

import numpy as np
import pytest

from service_support import fresh_id, tetrahedron
from isoclay.errors import InvalidInput, SolverFailure
from isoclay.history import BlobStore, HistoryStore, pack_mesh, unpack_mesh


def _finish(store, job_id, source, base=None, blob="0" * 64):
    store.create_job(job_id, source, "echo", {"k": job_id}, None, base)
    return store.finish_job(job_id, {"node_id": os.urandom(16).hex(), "input_hash": "1" * 64, "result_blob": blob,
                                     "metrics": {"m": 1.0}, "report": {}, "warnings": []})


def test_store_uses_wal_and_full_sync_and_survives_reopen(tmp_path):
    store = HistoryStore(tmp_path / "h.sqlite3")
    assert store.db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert store.db.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL (SQLite docs: 0 OFF, 1 NORMAL, 2 FULL)
    a = _finish(store, "a", "Jug")
    store.close()
    again = HistoryStore(tmp_path / "h.sqlite3")
    assert [n.node_id for n in again.nodes("Jug")] == [a] and again.current("Jug") == a
    assert again.integrity_check() == "ok"


def test_undo_redo_move_a_pointer_and_never_delete(tmp_path):
    s = HistoryStore(tmp_path / "h.sqlite3")
    a = _finish(s, "a", "Jug")
    b = _finish(s, "b", "Jug")
    c = _finish(s, "c", "Jug")
    assert [n.parent for n in s.nodes("Jug")] == ["", a, b]
    assert s.undo("Jug") == b and s.undo("Jug") == a and s.undo("Jug") == "" and s.undo("Jug") == ""
    assert s.redo("Jug") == a and s.redo("Jug") == b and s.redo("Jug") == c and s.redo("Jug") == c
    assert len(s.nodes("Jug")) == 3
    # Undo twice, edit: a branch. Redo from a now follows the new branch; the old one is kept.
    s.undo("Jug"), s.undo("Jug")
    d = _finish(s, "d", "Jug")
    assert s.node(d).parent == a and len(s.nodes("Jug")) == 4
    s.undo("Jug")
    assert s.redo("Jug") == d
    assert s.checkout("Jug", c) == c and s.current("Jug") == c
    with pytest.raises(InvalidInput):
        s.checkout("Jug", "f" * 32)
    assert s.checkout("Jug", "") == ""
    e = _finish(s, "e", "Jug", base=b)  # explicit branch from b
    assert s.node(e).parent == b
    assert s.nodes("Other") == [] and s.current("Other") == ""


def test_one_job_makes_one_node(tmp_path):
    s = HistoryStore(tmp_path / "h.sqlite3")
    first = _finish(s, "a", "Jug")
    row, created = s.create_job("a", "Jug", "echo", {}, None, None)
    assert not created and row.node_id == first
    again = s.finish_job("a", {"node_id": "9" * 32, "input_hash": "1" * 64, "result_blob": "0" * 64})
    assert again == first
    assert s.db.execute("SELECT COUNT(*) FROM nodes").fetchone()[0] == 1
    with pytest.raises(sqlite3.IntegrityError):  # the UNIQUE constraint is the last line of defence
        s.db.execute("INSERT INTO nodes SELECT '8' || substr(node_id, 2), job_id, source_key, parent, task, params, "
                     "input_hash, field_blob, result_field_blob, result_blob, metrics, report, warnings, created, "
                     "finished FROM nodes")


def test_recover_marks_unfinished_jobs_interrupted(tmp_path):
    s = HistoryStore(tmp_path / "h.sqlite3")
    s.create_job("q", "Jug", "remesh", {}, None, None)
    s.create_job("r", "Jug", "remesh", {}, None, None)
    s.set_job_state("r", "running")
    _finish(s, "d", "Jug")
    assert sorted(s.recover()) == ["q", "r"]
    assert s.job("q").state == "interrupted" and s.job("d").state == "done"


def test_store_refuses_a_database_of_another_format(tmp_path):
    s = HistoryStore(tmp_path / "h.sqlite3")
    s.db.execute("UPDATE meta SET value='99' WHERE key='format'")
    s.close()
    with pytest.raises(InvalidInput):
        HistoryStore(tmp_path / "h.sqlite3")


def test_blobs_are_content_addressed_verified_and_never_torn(tmp_path):
    blobs = BlobStore(tmp_path / "b")
    data = os.urandom(10_000)
    h = blobs.put_bytes(data)
    assert h == hashlib.sha256(data).hexdigest()  # FIPS 180-4 via hashlib
    assert blobs.put_bytes([data[:10], data[10:]]) == h  # same content, same file
    assert blobs.read(h) == data
    path = blobs.path(h)
    assert oct(path.stat().st_mode & 0o777) == oct(0o600)
    corrupted = bytearray(data)
    corrupted[5] ^= 1
    path.write_bytes(bytes(corrupted))
    assert not blobs.verify(h)
    with pytest.raises(SolverFailure):
        blobs.read(h)
    with pytest.raises(SolverFailure):
        blobs.read("a" * 64)
    for bad in ("../../etc/passwd", "A" * 64, "a" * 63, None):
        with pytest.raises(InvalidInput):
            blobs.path(bad)
    (path.parent / ".tmp-1-x").write_bytes(b"half")  # a crash mid-write leaves only a temporary
    assert blobs.clean_temporaries() == 1


def test_mesh_blob_round_trip():
    v, f = tetrahedron()
    values = {"stretch": np.linspace(0, 1, 4, dtype=np.float32)}
    data = b"".join(bytes(x) for x in pack_mesh(v, f, values))
    v2, f2, values2 = unpack_mesh(data)
    np.testing.assert_array_equal(v2, v)
    np.testing.assert_array_equal(f2, f)
    np.testing.assert_array_equal(values2["stretch"], values["stretch"])
    with pytest.raises(SolverFailure):
        unpack_mesh(b"not a mesh" + data)


def test_history_through_the_wire(client):
    v, f = tetrahedron()
    source = fresh_id("hist")
    ids = []
    for _ in range(3):
        job = fresh_id()
        client.wait(client.submit(job, "echo", {"delay_s": 0.0}, v, f, source_key=source)["job_id"], timeout_s=30)
        ids.append(client.poll(job)["node_id"])
    nodes = client.history(source)
    assert [n["id"] for n in nodes] == ids and [n["current"] for n in nodes] == [False, False, True]
    assert client.undo(source) == ids[1]
    assert [n["current"] for n in client.history(source)] == [False, True, False]
    assert client.redo(source) == ids[2]
    assert client.checkout(source, "") == ""
    rec = client.fetch_node(ids[0])
    np.testing.assert_array_equal(rec.vertices, v)
    assert rec.node_id == ids[0]
    # Branch from the first node: the new node's parent is that node, and it starts from its result.
    job = fresh_id()
    client.branch_from(ids[0], job, "echo", {"delay_s": 0.0}, source)
    assert client.wait(job, timeout_s=30)["state"] == "done"
    branch = client.history(source)[-1]
    assert branch["parent"] == ids[0] and branch["current"]
    np.testing.assert_array_equal(client.result(job).vertices, v)


def test_field_cache_is_content_addressed_and_lru_bounded(tmp_path):
    torch = pytest.importorskip("torch")
    from isoclay.field.analytic import SphereSDF
    from isoclay.field.cache import FieldCache

    cache = FieldCache(tmp_path / "c", max_bytes=10**9)
    keys = [hashlib.sha256(str(i).encode()).hexdigest() for i in range(4)]
    for i, key in enumerate(keys[:3]):
        cache.put(key, SphereSDF(radius=0.1 + 0.1 * i))
    one = cache.entries()[0][1]
    field, extra = cache.get(keys[1])
    # Sphere SDF |x| - r (analytic): the reloaded field gives the radius it was saved with.
    np.testing.assert_allclose(field(torch.zeros(1, 3)).item(), -0.2, atol=1e-6)
    assert extra["cache_key"] == keys[1]
    os.utime(cache.path(keys[0]), (1, 1))  # make key 0 the least recently used
    os.utime(cache.path(keys[2]), (2, 2))
    cache.max_bytes = 3 * one
    cache.put(keys[3], SphereSDF(radius=0.5))  # four entries > three fit: evict the LRU one
    assert keys[0] not in cache and keys[1] in cache and keys[3] in cache
    assert cache.size() <= cache.max_bytes
    cache.path(keys[2]).write_bytes(b"garbage")
    assert cache.get(keys[2]) is None and keys[2] not in cache  # a damaged entry is a miss, then dropped
    for bad in ("../x", "g" * 64, "A" * 64, 5):
        with pytest.raises(InvalidInput):
            cache.get(bad)
    with pytest.raises(InvalidInput):
        FieldCache(tmp_path / "c2", max_bytes=0)


def test_history_summaries_leave_out_bulky_parameters():
    from isoclay.service.server import MAX_PARAMS_CHARS, _compact

    small = {"id": "a", "params": {"strength": 0.5}}
    assert _compact(small) == small
    bulky = {"id": "a", "params": {"handles": [[0.1, 0.2, 0.3]] * 500}}
    out = _compact(bulky)
    assert out["params"]["omitted_bytes"] > MAX_PARAMS_CHARS and bulky["params"]["handles"]  # caller's dict intact
