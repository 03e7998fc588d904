"""The wire schema: every message type round-trips; every check refuses its bad input; copies stay identical."""

from __future__ import annotations

import ast
import hashlib
import hmac
import os
import subprocess
import sys
import time
from pathlib import Path

import msgpack
import numpy as np
import pytest

from service_support import ROOT, SOLVER, tetrahedron
from isoclay import wire
from isoclay.service.auth import ReplayGuard

KEY = bytes(range(32))


def roundtrip(kind, body, arrays=None, schema=None):
    frames = wire.encode(KEY, kind, body, arrays, session="a" * 32, seq=7, boot="b" * 32, re=3)
    return wire.decode(KEY, [bytes(f) for f in frames], schema or (wire.REQUESTS if kind in wire.REQUESTS else wire.REPLIES))


REQUEST_EXAMPLES = {
    "ping": {},
    "submit": {"job_id": "j-1", "task": "remesh", "params": {"resolution": 64, "fit": {"steps": 10}},
               "source_key": "Jug", "parent_node": None, "mesh_hash": "0" * 64},
    "poll": {"job_id": "j-1"}, "cancel": {"job_id": "j-1"}, "resume": {"job_id": "j-1"}, "result": {"job_id": "j-1"},
    "fetch_node": {"node_id": "c" * 32}, "history": {"source_key": "Jug"}, "undo": {"source_key": "Jug"},
    "redo": {"source_key": "Jug"}, "checkout": {"source_key": "Jug", "node_id": ""},
}
REPLY_EXAMPLES = {
    "pong": {"boot_id": "b" * 32, "version": "0.1.0", "protocol": 1, "server_time": 1.5, "queued": 0, "running": 1},
    "job": {"job_id": "j-1", "state": "running", "stage": "fit", "fraction": 0.25, "info": {"step": 3}, "error": None,
            "node_id": None, "task": "remesh", "source_key": "Jug", "warnings": []},
    "mesh": {"node_id": "c" * 32, "job_id": "j-1", "task": "remesh", "metrics": {"a": 1.0}, "report": {"x": [1, 2]},
             "warnings": ["w"]},
    "history": {"source_key": "Jug", "current": "", "nodes": [{"id": "c" * 32, "current": False}]},
    "error": {"code": "invalid_mesh", "message": "one line"},
}


def test_every_message_type_round_trips():
    # The two tables above must cover the whole schema, so a new type cannot go untested.
    assert set(REQUEST_EXAMPLES) == set(wire.REQUESTS)
    assert set(REPLY_EXAMPLES) == set(wire.REPLIES)
    examples = [(k, b, wire.REQUESTS) for k, b in REQUEST_EXAMPLES.items()]
    examples += [(k, b, wire.REPLIES) for k, b in REPLY_EXAMPLES.items()]
    for kind, body, schema in examples:
        msg = roundtrip(kind, body, schema=schema)
        assert (msg.type, msg.body, msg.session, msg.seq, msg.boot, msg.re) == (kind, body, "a" * 32, 7, "b" * 32, 3)


def test_arrays_round_trip_bit_exact_for_every_allowed_dtype():
    v, f = tetrahedron()
    msg = roundtrip("submit", REQUEST_EXAMPLES["submit"], {"vertices": v, "faces": f})
    np.testing.assert_array_equal(msg.arrays["vertices"], v)
    np.testing.assert_array_equal(msg.arrays["faces"], f)
    rng = np.random.default_rng(0)
    for code in wire.DTYPES:
        a = (rng.random((5, 3)) * 100).astype(code)
        got = roundtrip("mesh", REPLY_EXAMPLES["mesh"], {"value:x": a}, wire.REPLIES).arrays["value:x"]
        assert got.dtype == np.dtype(code) and got.tobytes() == a.tobytes()
    # Big-endian input is converted, values preserved.
    be = np.arange(6, dtype=">f8").reshape(2, 3)
    np.testing.assert_array_equal(roundtrip("mesh", REPLY_EXAMPLES["mesh"], {"value:x": be}, wire.REPLIES).arrays["value:x"], be)


def test_signature_is_hmac_sha256_of_a_header_binding_each_frame_by_sha256():
    # RFC 2104 HMAC and FIPS 180-4 SHA-256 via the standard library, independently of wire.sign.
    v, f = wire.canonical_mesh(*tetrahedron())
    frames = wire.encode(KEY, "submit", REQUEST_EXAMPLES["submit"], {"vertices": v, "faces": f}, session="a" * 32, seq=1)
    assert bytes(frames[0]) == hmac.new(KEY, bytes(frames[1]), hashlib.sha256).digest()
    header = msgpack.unpackb(bytes(frames[1]), raw=False)
    for descriptor, frame in zip(header["arrays"], frames[2:]):
        assert descriptor[3] == hashlib.sha256(bytes(frame)).hexdigest()
    assert wire.mesh_hash(v, f) == wire.message_mesh_hash(wire.decode(KEY, [bytes(x) for x in frames], wire.REQUESTS))


def _frames(kind="ping", body=None, arrays=None):
    return [bytes(f) for f in wire.encode(KEY, kind, body if body is not None else {}, arrays, session="a" * 32, seq=1)]


def _resign(header: dict, arrays=()):
    for d, a in zip(header["arrays"], arrays):
        if len(d) == 3:
            d.append(hashlib.sha256(a).hexdigest())
    raw = msgpack.packb(header, use_bin_type=True)
    return [wire.sign(KEY, raw), raw, *arrays]


def _header(**over):
    h = {"v": 1, "type": "ping", "session": "a" * 32, "seq": 1, "t": time.time(), "boot": "", "re": 0, "body": {},
         "arrays": []}
    h.update(over)
    return h


@pytest.mark.parametrize("mutate, code", [
    (lambda h: h.update(v=2), "bad_version"),
    (lambda h: h.update(type="launch"), "bad_message"),
    (lambda h: h.pop("seq"), "bad_message"),
    (lambda h: h.update(seq=-1), "bad_message"),
    (lambda h: h.update(t=time.time() - 3600), "stale_clock"),
    (lambda h: h.update(body={"extra": 1}), "bad_message"),
    (lambda h: h.update(type="poll", body={"job_id": "../../etc/passwd"}), "bad_message"),
    (lambda h: h.update(type="submit", body=dict(REQUEST_EXAMPLES["submit"], mesh_hash="/tmp/x")), "bad_message"),
    (lambda h: h.update(type="submit", body=dict(REQUEST_EXAMPLES["submit"], params={"a": float("nan")})), "bad_message"),
    (lambda h: h.update(type="submit", body=dict(REQUEST_EXAMPLES["submit"], params={"a": [[[[[[[[[[1]]]]]]]]]]})),
     "bad_message"),
])
def test_header_validation_refuses_bad_fields(mutate, code):
    h = _header()
    mutate(h)
    with pytest.raises(wire.WireError) as err:
        wire.decode(KEY, _resign(h), wire.REQUESTS)
    assert err.value.code == code
    assert "\n" not in str(err.value)


def test_duplicate_keys_extension_types_and_trailing_bytes_are_refused():
    raw = msgpack.packb(_header(), use_bin_type=True)
    # A map with "type" twice: hand-built msgpack (fixmap of 10 entries, msgpack spec 2.0).
    items = list(_header().items()) + [("type", "poll")]
    dup = bytes([0x80 | len(items)]) + b"".join(msgpack.packb(k) + msgpack.packb(v) for k, v in items)
    ext = msgpack.packb(_header(body={"x": msgpack.ExtType(5, b"abc")}), use_bin_type=True)
    binary = msgpack.packb(_header(body={"x": b"raw"}), use_bin_type=True)
    for bad in (dup, ext, binary, raw + b"\x00", b"\xc1", b""):
        with pytest.raises(wire.WireError) as err:
            wire.decode(KEY, [wire.sign(KEY, bad), bad], wire.REQUESTS)
        assert err.value.code == "bad_message"


@pytest.mark.parametrize("descriptor, payload, what", [
    (["vertices", "<f2", [1, 3]], b"\0" * 6, "dtype"),
    (["vertices", "|O", [1, 3]], b"\0" * 24, "dtype"),
    (["vertices", ">f8", [1, 3]], b"\0" * 24, "dtype"),
    (["vertices", "<f8", [1, 3]], b"\0" * 23, "bytes"),
    (["vertices", "<f8", [1, 3], "0" * 64], b"\0" * 24, "digest"),
    (["vertices", "<f8", [1, 3], "not hex"], b"\0" * 24, "digest format"),
    (["vertices", "<f8", [1, 3, 1]], b"\0" * 24, "shape"),
    (["vertices", "<f8", [wire.MAX_DIM + 1, 3]], b"", "shape"),
    (["../x", "<f8", [1, 3]], b"\0" * 24, "name"),
])
def test_array_descriptors_are_checked_before_use(descriptor, payload, what):
    h = _header(type="submit", body=REQUEST_EXAMPLES["submit"], arrays=[descriptor])
    with pytest.raises(wire.WireError) as err:
        wire.decode(KEY, _resign(h, [payload]), wire.REQUESTS)
    assert err.value.code in (("bad_signature",) if what == "digest" else ("bad_message",)), what


def test_frame_count_must_match_descriptors_and_arrays_only_where_allowed():
    h = _header(type="submit", body=REQUEST_EXAMPLES["submit"], arrays=[["vertices", "<f8", [1, 3]]])
    with pytest.raises(wire.WireError):
        wire.decode(KEY, _resign(h, []), wire.REQUESTS)
    h = _header(arrays=[["vertices", "<f8", [1, 3]]])  # a ping with an array
    with pytest.raises(wire.WireError):
        wire.decode(KEY, _resign(h, [b"\0" * 24]), wire.REQUESTS)
    with pytest.raises(wire.WireError):
        wire.decode(KEY, [b"\0" * 32] * (wire.MAX_ARRAYS + 3), wire.REQUESTS)


def test_every_single_bit_flip_in_every_frame_is_rejected():
    v, f = tetrahedron()
    frames = _frames("submit", REQUEST_EXAMPLES["submit"], {"vertices": v, "faces": f})
    flips = 0
    for i, frame in enumerate(frames):
        for bit in range(len(frame) * 8):
            bad = bytearray(frame)
            bad[bit // 8] ^= 1 << (bit % 8)
            mutated = frames[:i] + [bytes(bad)] + frames[i + 1:]
            with pytest.raises(wire.WireError) as err:
                wire.decode(KEY, mutated, wire.REQUESTS)
            assert err.value.code == "bad_signature"
            flips += 1
    assert flips == 8 * sum(len(fr) for fr in frames)
    wire.decode(KEY, frames, wire.REQUESTS)  # the unmodified message still passes


def test_forged_messages_are_rejected():
    frames = _frames()
    with pytest.raises(wire.WireError) as err:
        wire.decode(b"k" * 32, frames, wire.REQUESTS)  # signed with another key
    assert err.value.code == "bad_signature"
    with pytest.raises(wire.WireError):
        wire.decode(KEY, [b"\0" * 32, frames[1]], wire.REQUESTS)  # unsigned
    with pytest.raises(wire.WireError):
        wire.decode(KEY, [frames[0][:31], frames[1]], wire.REQUESTS)  # truncated signature


def test_replay_guard_accepts_increasing_seq_and_retry_of_the_last_only():
    g = ReplayGuard()
    assert g.classify("s", 1, b"x")[0] == "new"
    g.record("s", 1, b"x", "reply-1")
    assert g.classify("s", 1, b"x") == ("retry", "reply-1")
    assert g.classify("s", 1, b"y")[0] == "replay"  # same seq, different content
    g.record("s", 5, b"z", None)
    assert g.classify("s", 3, b"w")[0] == "replay"
    assert g.classify("s", 6, b"v")[0] == "new"


@pytest.mark.parametrize("vertices, faces, fragment", [
    (np.zeros((0, 3)), np.zeros((1, 3), np.int64), "no vertices"),
    (np.eye(3), np.zeros((0, 3), np.int64), "no triangles"),
    (np.array([[0, 0, 0], [np.nan, 0, 0], [0, 1, 0]]), np.array([[0, 1, 2]]), "NaN"),
    (np.array([[0, 0, 0], [np.inf, 0, 0], [0, 1, 0]]), np.array([[0, 1, 2]]), "NaN or infinite"),
    (np.eye(3), np.array([[0, 1, 3]]), "face index 3"),
    (np.eye(3), np.array([[0, -1, 2]]), "face index -1"),
])
def test_mesh_checks_name_the_problem(vertices, faces, fragment):
    with pytest.raises(wire.WireError) as err:
        wire.check_mesh(np.asarray(vertices, "<f8"), np.asarray(faces, "<i8"))
    assert err.value.code == "invalid_mesh" and fragment in str(err.value)


def test_canonical_mesh_refuses_wrong_shapes_and_hash_depends_on_content():
    with pytest.raises(wire.WireError):
        wire.canonical_mesh(np.zeros((3, 2)), np.zeros((1, 3)))
    with pytest.raises(wire.WireError):
        wire.canonical_mesh(np.zeros((3, 3)), np.zeros((1, 4)))
    v, f = tetrahedron()
    h = wire.mesh_hash(v, f)
    assert wire.is_hex64(h)
    assert wire.mesh_hash(v.astype(np.float32), f.astype(np.int64)) == h  # canonical dtypes
    with pytest.raises(wire.WireError):
        wire.canonical_mesh(v, f + 2**40)  # an index that int32 cannot hold is refused, never wrapped
    with pytest.raises(wire.WireError):
        wire.canonical_mesh(v, f.astype(np.float64))
    v2 = v.copy()
    v2[0, 0] = np.nextafter(0.0, 1.0)
    assert wire.mesh_hash(v2, f) != h
    with pytest.raises(wire.WireError):
        wire.key_bytes("not-hex")


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text())
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(a.name.split(".")[0] for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0:
            names.add(node.module.split(".")[0])
    return names


def test_wire_and_client_import_only_stdlib_numpy_msgpack_zmq():
    allowed = set(sys.stdlib_module_names) | {"numpy", "msgpack"}
    assert _imports(SOLVER / "isoclay" / "wire.py") <= allowed
    assert _imports(SOLVER / "isoclay" / "client.py") <= allowed | {"zmq"}


def test_copied_files_work_in_blenders_python_without_isoclay(tmp_path):
    # The add-on copies wire.py and client.py verbatim into a package (tests/test_addon_copies.py
    # proves the copies are identical); prove they run there: Blender's numpy<2, no torch, no isoclay.
    python = ROOT / ".venv-blender" / "bin" / "python"
    if not python.exists():
        pytest.skip("no .venv-blender")
    pkg = tmp_path / "addon_pkg"
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    for name in ("wire.py", "client.py"):
        (pkg / name).write_bytes((SOLVER / "isoclay" / name).read_bytes())
    code = (
        "import sys; from addon_pkg import wire, client; import numpy as np\n"
        "k = bytes(32); v, f = wire.canonical_mesh(np.eye(3), np.array([[0, 1, 2]]))\n"
        "fr = wire.encode(k, 'submit', {'job_id': 'a', 'task': 'echo', 'params': {}, 'source_key': 's',"
        " 'parent_node': None, 'mesh_hash': wire.mesh_hash(v, f)}, {'vertices': v, 'faces': f}, session='x', seq=1)\n"
        "m = wire.decode(k, [bytes(x) for x in fr], wire.REQUESTS); wire.mesh_arrays(m)\n"
        "assert 'torch' not in sys.modules and 'isoclay' not in sys.modules\n"
        "print(wire.mesh_hash(v, f))\n")
    out = subprocess.run([str(python), "-c", code], cwd=tmp_path, capture_output=True, text=True, timeout=60,
                         env={k: val for k, val in os.environ.items() if k != "PYTHONPATH"})
    assert out.returncode == 0, out.stderr[-500:]
    assert out.stdout.strip() == wire.mesh_hash(np.eye(3), np.array([[0, 1, 2]]))
