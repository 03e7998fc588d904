"""The one definition of isoclay's wire messages: signed msgpack header plus raw array frames.

Imports only the standard library, numpy and msgpack: the Blender add-on build copies this file
verbatim (a test proves the copy is identical). See docs/wire.md for the protocol.

A message is a list of frames: [signature (32 bytes), header (msgpack map), array bytes...].
The signature is HMAC-SHA256 over the header, and the header lists the SHA-256 of every array
frame, so the signature covers every frame while each frame is hashed only once per side (the
same digests give the mesh's content hash for free). Nothing is ever unpickled; msgpack
extension types and duplicate map keys are refused.
"""

from __future__ import annotations

import hashlib
import hmac
import math
from concurrent.futures import ThreadPoolExecutor
import os
import re
import time
from dataclasses import dataclass, field

import msgpack
import numpy as np

#: Protocol version carried in every header; a peer with another version is refused.
PROTOCOL = 1
SIGNATURE_BYTES = 32
#: Limits checked before any array is looked at.
MAX_HEADER_BYTES = 4 << 20
#: 64 handle groups (one frame each) + vertices + faces + per-vertex values and correspondence.
MAX_ARRAYS = 80
MAX_DIM = 20_000_000
MAX_MESSAGE_BYTES = 2 << 30
#: Largest single frame: (20,000,000, 3) float64 vertices are 480 MB. Also set as the socket's
#: ZMQ_MAXMSGSIZE, which ZeroMQ applies to each frame (not to a whole message).
MAX_FRAME_BYTES = 512 << 20
MAX_STR = 4096
MAX_DEPTH = 8
MAX_ITEMS = 100_000
#: Array dtypes a peer may send (little-endian only).
DTYPES = {"<f4": np.dtype("<f4"), "<f8": np.dtype("<f8"), "<i4": np.dtype("<i4"), "<i8": np.dtype("<i8"),
          "<u4": np.dtype("<u4"), "|u1": np.dtype("|u1")}
#: A message more than this many seconds off the receiver's clock is refused (replay window).
CLOCK_WINDOW_S = 300.0

STATES = ("queued", "running", "done", "failed", "cancelled", "interrupted")
FINAL_STATES = ("done", "failed", "cancelled", "interrupted")

_JOB_ID = re.compile(r"^[A-Za-z0-9_.:\-]{1,128}$")
_TASK = re.compile(r"^[a-z][a-z_]{0,31}$")
_HEX32 = re.compile(r"^[0-9a-f]{32}$")
_HEX64 = re.compile(r"^[0-9a-f]{64}$")
#: vertices, faces, value:<name> (per-vertex values), handles:<group> ((k, 3) handle points of one group),
#: source_face / source_bary (per result vertex: the source face it came from and barycentric weights there)
_ARRAY_NAME = re.compile(r"^(vertices|faces|value:[A-Za-z0-9_.\-]{1,64}|handles:[0-9]{1,4}|source_face|source_bary)$")


class WireError(Exception):
    """A message is malformed, unsigned, replayed or too large. ``code`` names the kind."""

    def __init__(self, message: str, code: str = "bad_message"):
        super().__init__(message)
        self.code = code


@dataclass(frozen=True)
class Message:
    """A decoded, verified message.

    arrays : name -> read-only numpy array viewing the received frame (copy before mutating)
    """

    type: str
    body: dict
    session: str = ""
    seq: int = 0
    boot: str = ""
    re: int = 0
    t: float = 0.0
    arrays: dict = field(default_factory=dict)
    digests: dict = field(default_factory=dict)


# ---------------------------------------------------------------- keys and ids

def new_key() -> str:
    """A fresh 256-bit signing key as 64 hex characters."""
    return os.urandom(32).hex()


def new_id() -> str:
    """A fresh random id (sessions, boot ids, node ids): 32 hex characters."""
    return os.urandom(16).hex()


def key_bytes(key) -> bytes:
    """The signing key from a connection file's hex string (or raw bytes)."""
    if isinstance(key, (bytes, bytearray)):
        raw = bytes(key)
    elif isinstance(key, str) and _HEX64.match(key):
        raw = bytes.fromhex(key)
    else:
        raise WireError("the signing key must be 64 hex characters: regenerate the connection file", "bad_key")
    if len(raw) < 16:
        raise WireError("the signing key is shorter than 16 bytes: regenerate the connection file", "bad_key")
    return raw


def is_hex64(text) -> bool:
    return isinstance(text, str) and bool(_HEX64.match(text))


#: ZeroMQ PLAIN user name of every client of a solver without CURVE (see admission_password).
ADMISSION_USER = "isoclay"


def admission_password(key: bytes) -> str:
    """The PLAIN password a client must give before the solver reads any of its messages.

    Derived from the signing key (HMAC-SHA256 with a fixed label, 64 hex), so only holders of
    the connection file can connect, while the key itself never travels (PLAIN sends the
    password in clear, which on loopback only the machine's administrator can watch).
    """
    return hmac.new(key, b"isoclay-admission-1", hashlib.sha256).hexdigest()


_POOL: ThreadPoolExecutor | None = None
#: Frames at least this large are hashed on two threads (hashlib releases the GIL).
PARALLEL_HASH_BYTES = 1 << 20


def frame_digests(frames) -> list[str]:
    """SHA-256 (hex) of each frame; large frames hashed concurrently."""
    views = [memoryview(f).cast("B") if memoryview(f).nbytes else b"" for f in frames]
    if len(views) > 1 and sum(len(v) for v in views) >= 2 * PARALLEL_HASH_BYTES:
        global _POOL
        if _POOL is None:
            _POOL = ThreadPoolExecutor(max_workers=2, thread_name_prefix="isoclay-hash")
        return list(_POOL.map(lambda v: hashlib.sha256(v).hexdigest(), views))
    return [hashlib.sha256(v).hexdigest() for v in views]


def mesh_hash_from_digests(n_vertices: int, n_faces: int, vertex_digest: str, face_digest: str) -> str:
    """The mesh content hash from the SHA-256 of its canonical vertex and face frames."""
    text = f"isoclay-mesh-1:{n_vertices}:{n_faces}:{vertex_digest}:{face_digest}"
    return hashlib.sha256(text.encode()).hexdigest()


def mesh_hash(vertices: np.ndarray, faces: np.ndarray) -> str:
    """Content hash (64 hex) of a mesh in its canonical wire form: (n,3) <f8 and (m,3) <i4."""
    v, f = canonical_mesh(vertices, faces)
    dv, df = frame_digests([v, f])
    return mesh_hash_from_digests(len(v), len(f), dv, df)


def canonical_mesh(vertices, faces) -> tuple[np.ndarray, np.ndarray]:
    """Contiguous little-endian (n,3) float64 vertices and (m,3) int32 faces (copies only if needed)."""
    v = np.ascontiguousarray(vertices, dtype="<f8")
    f = np.asarray(faces)
    if v.ndim != 2 or v.shape[1] != 3:
        raise WireError(f"vertices must have shape (n, 3), got {v.shape}: pass one xyz row per vertex", "invalid_mesh")
    if f.ndim != 2 or f.shape[1] != 3:
        raise WireError(f"faces must have shape (m, 3), got {f.shape}: triangulate the mesh first", "invalid_mesh")
    if f.dtype.kind not in "iu":
        raise WireError(f"faces must hold integers, got {f.dtype}: pass vertex indices", "invalid_mesh")
    if f.size and f.dtype.itemsize > 4 and (f.max() > MAX_DIM or f.min() < -1):
        bad = int(f.max()) if f.max() > MAX_DIM else int(f.min())
        raise WireError(f"the mesh has a face index {bad} outside 0..{len(v) - 1}: re-export the object", "invalid_mesh")
    return v, np.ascontiguousarray(f, dtype="<i4")


def check_mesh(vertices: np.ndarray, faces: np.ndarray) -> None:
    """Refuse meshes nothing can run on: empty, non-finite coordinates, face indices out of range."""
    if vertices.ndim != 2 or vertices.shape[1] != 3 or vertices.shape[0] == 0:
        raise WireError(f"the mesh has no vertices (shape {vertices.shape}): send an object with geometry", "invalid_mesh")
    if faces.ndim != 2 or faces.shape[1] != 3 or faces.shape[0] == 0:
        raise WireError(f"the mesh has no triangles (shape {faces.shape}): send a surface, not loose points", "invalid_mesh")
    if np.isfinite(vertices.ravel()).all():
        finite = None
    else:
        finite = np.isfinite(vertices).all(axis=1)
    if finite is not None:
        first = int(np.argmin(finite))
        raise WireError(f"the mesh has {int((~finite).sum())} vertices with NaN or infinite coordinates "
                        f"(first: vertex {first}): repair or delete them", "invalid_mesh")
    lo, hi = int(faces.min()), int(faces.max())
    if lo < 0 or hi >= vertices.shape[0]:
        bad = hi if hi >= vertices.shape[0] else lo
        raise WireError(f"the mesh has a face index {bad} outside 0..{vertices.shape[0] - 1}: re-export the object",
                        "invalid_mesh")


# ---------------------------------------------------------------- signing

def sign(key: bytes, header) -> bytes:
    """HMAC-SHA256 (RFC 2104) of the header, which carries the SHA-256 of every array frame."""
    return hmac.new(key, memoryview(header), hashlib.sha256).digest()


# ---------------------------------------------------------------- schemas

def _str(limit=MAX_STR):
    def check(v):
        return isinstance(v, str) and len(v) <= limit
    return check


def _match(pattern, optional=False):
    def check(v):
        return (optional and v is None) or (isinstance(v, str) and bool(pattern.match(v)))
    return check


def _num(v):
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _int(v):
    return isinstance(v, int) and not isinstance(v, bool)


def _map(v):
    return isinstance(v, dict)


def _list(v):
    return isinstance(v, list)


def _opt_str(v):
    return v is None or (isinstance(v, str) and len(v) <= MAX_STR)


def _node_or_empty(v):
    return isinstance(v, str) and (v == "" or bool(_HEX32.match(v)))


_job_id = _match(_JOB_ID)
_source = _str(512)

#: For each message type: required body fields and their checks (no other fields allowed).
REQUESTS = {
    "ping": {},
    "submit": {"job_id": _job_id, "task": _match(_TASK), "params": _map, "source_key": _source,
               "parent_node": _match(_HEX32, optional=True), "mesh_hash": _match(_HEX64, optional=True)},
    "poll": {"job_id": _job_id},
    "cancel": {"job_id": _job_id},
    "resume": {"job_id": _job_id},
    "result": {"job_id": _job_id},
    "fetch_node": {"node_id": _match(_HEX32)},
    "history": {"source_key": _source},
    "undo": {"source_key": _source},
    "redo": {"source_key": _source},
    "checkout": {"source_key": _source, "node_id": _node_or_empty},
}
REPLIES = {
    "pong": {"boot_id": _match(_HEX32), "version": _str(64), "protocol": _int, "server_time": _num,
             "queued": _int, "running": _int},
    "job": {"job_id": _job_id, "state": lambda v: v in STATES, "stage": _str(), "fraction": _num, "info": _map,
            "error": _opt_str, "node_id": _opt_str, "task": _str(64), "source_key": _source, "warnings": _list},
    "mesh": {"node_id": _str(64), "job_id": _opt_str, "task": _str(64), "metrics": _map, "report": _map,
             "warnings": _list},
    "history": {"source_key": _source, "current": _str(64), "nodes": _list},
    "error": {"code": _match(re.compile(r"^[a-z_]{1,32}$")), "message": _str()},
}
#: Requests that change server state must name the server's current boot id (replay across restarts).
NEEDS_BOOT = {"submit", "cancel", "resume", "undo", "redo", "checkout"}
#: Message types that may carry arrays.
WITH_ARRAYS = {"submit", "mesh"}


def check_body(kind: str, body: dict, schema: dict) -> None:
    spec = schema.get(kind)
    if spec is None:
        raise WireError(f"unknown message type {kind!r}: update the add-on and the solver to the same version",
                        "bad_message")
    extra = set(body) - set(spec)
    if extra:
        raise WireError(f"{kind} message has unexpected field(s) {sorted(extra)[:3]}", "bad_message")
    for name, check in spec.items():
        if name not in body:
            raise WireError(f"{kind} message lacks the field {name!r}", "bad_message")
        if not check(body[name]):
            raise WireError(f"{kind} message has an invalid {name!r}: {_short(body[name])}", "bad_message")


def _short(value) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _check_plain(value, depth: int = 0, budget: list | None = None) -> None:
    """Only JSON-like values (no bytes, bounded depth, size and string length, finite floats)."""
    budget = budget if budget is not None else [MAX_ITEMS]
    budget[0] -= 1
    if budget[0] < 0:
        raise WireError(f"header has more than {MAX_ITEMS} items: send arrays as array frames", "bad_message")
    if depth > MAX_DEPTH:
        raise WireError(f"header nesting deeper than {MAX_DEPTH}", "bad_message")
    if value is None or isinstance(value, (bool, int)):
        if isinstance(value, int) and not isinstance(value, bool) and abs(value) > (1 << 63):
            raise WireError("header integer out of range", "bad_message")
        return
    if isinstance(value, float):
        if not math.isfinite(value):
            raise WireError("header holds a NaN or infinite number: send finite parameters", "bad_message")
        return
    if isinstance(value, str):
        if len(value) > MAX_STR * 4:
            raise WireError("header string too long", "bad_message")
        return
    if isinstance(value, list):
        for item in value:
            _check_plain(item, depth + 1, budget)
        return
    if isinstance(value, dict):
        for k, item in value.items():
            if not isinstance(k, str) or len(k) > 256:
                raise WireError("header map keys must be short strings", "bad_message")
            _check_plain(item, depth + 1, budget)
        return
    raise WireError(f"header holds a {type(value).__name__}: only maps, lists, strings and numbers are allowed",
                    "bad_message")


# ---------------------------------------------------------------- encode / decode

def _pairs_no_duplicates(pairs):
    out = {}
    for k, v in pairs:
        if k in out:
            raise WireError(f"header has the key {_short(k)} twice", "bad_message")
        out[k] = v
    return out


def _no_ext(code, data):
    raise WireError("header holds a msgpack extension type: not allowed", "bad_message")


def _array_frame(name: str, array: np.ndarray):
    """(descriptor without digest, frame buffer) of one array."""
    a = np.asarray(array)
    dt = a.dtype.newbyteorder("<") if a.dtype.byteorder == ">" else a.dtype
    a = np.ascontiguousarray(a, dtype=dt)
    code = a.dtype.str
    if code not in DTYPES:
        raise WireError(f"array {name!r} has dtype {a.dtype} which the wire does not carry: use float32/64 or int32/64",
                        "bad_message")
    if a.ndim not in (1, 2) or any(d > MAX_DIM for d in a.shape):
        raise WireError(f"array {name!r} has shape {a.shape}: 1 or 2 dimensions of at most {MAX_DIM}", "bad_message")
    return [name, code, list(a.shape)], memoryview(a).cast("B") if a.nbytes else b""


def encode(key: bytes, kind: str, body: dict, arrays: dict | None = None, *, session: str, seq: int,
           boot: str = "", re: int = 0, digests: dict | None = None) -> list:
    """Frames of one signed message; arrays are sent without copying when already contiguous LE.

    digests : optional name -> SHA-256 hex of arrays already hashed (e.g. just received), to skip rehashing
    """
    descriptors, frames = [], []
    for name, array in (arrays or {}).items():
        d, f = _array_frame(name, array)
        descriptors.append(d)
        frames.append(f)
    known = digests or {}
    todo = [i for i, d in enumerate(descriptors) if d[0] not in known]
    computed = dict(zip(todo, frame_digests([frames[i] for i in todo])))
    for i, d in enumerate(descriptors):
        d.append(known[d[0]] if d[0] in known else computed[i])
    header = msgpack.packb({"v": PROTOCOL, "type": kind, "session": session, "seq": int(seq), "t": time.time(),
                            "boot": boot, "re": int(re), "body": body, "arrays": descriptors}, use_bin_type=True)
    return [sign(key, header), header, *frames]


def encode_unsigned_error(message: str = "signature check failed: the connection file's key does not match "
                          "the solver's; reconnect with the current connection file") -> list:
    """The one reply sent to a message whose signature fails: no information beyond the code."""
    header = msgpack.packb({"v": PROTOCOL, "type": "error", "session": "", "seq": 0, "t": time.time(), "boot": "",
                            "re": 0, "body": {"code": "bad_signature", "message": message}, "arrays": []},
                           use_bin_type=True)
    return [b"\0" * SIGNATURE_BYTES, header]


def _unpack_header(raw) -> dict:
    view = memoryview(raw)
    if view.nbytes == 0 or view.nbytes > MAX_HEADER_BYTES:
        raise WireError(f"header of {view.nbytes} bytes (limit {MAX_HEADER_BYTES})", "bad_message")
    unpacker = msgpack.Unpacker(raw=False, strict_map_key=True, object_pairs_hook=_pairs_no_duplicates,
                                ext_hook=_no_ext, max_buffer_size=MAX_HEADER_BYTES, max_str_len=MAX_HEADER_BYTES,
                                max_bin_len=0, max_array_len=MAX_ITEMS, max_map_len=MAX_ITEMS, max_ext_len=0)
    try:
        unpacker.feed(view)
        header = unpacker.unpack()
        try:
            unpacker.unpack()
        except msgpack.OutOfData:
            pass
        else:
            raise WireError("header has trailing data after the map", "bad_message")
    except WireError:
        raise
    except (msgpack.OutOfData, ValueError, TypeError, msgpack.ExtraData, msgpack.FormatError,
            msgpack.StackError, UnicodeDecodeError, RecursionError, OverflowError) as exc:
        raise WireError(f"header is not valid msgpack ({type(exc).__name__})", "bad_message") from None
    if not isinstance(header, dict):
        raise WireError("header is not a map", "bad_message")
    return header


_HEADER_KEYS = {"v", "type", "session", "seq", "t", "boot", "re", "body", "arrays"}


def peek_unsigned_error(frames) -> str | None:
    """If frames are the unsigned bad_signature reply, its message; else None (used by the client)."""
    try:
        if len(frames) != 2 or bytes(memoryview(frames[0])) != b"\0" * SIGNATURE_BYTES:
            return None
        header = _unpack_header(frames[1])
        body = header.get("body")
        if header.get("type") == "error" and isinstance(body, dict) and body.get("code") == "bad_signature":
            return str(body.get("message", ""))[:300]
    except WireError:
        return None
    return None


def decode(key: bytes, frames, schema: dict, *, now: float | None = None) -> Message:
    """Verify and decode one message (frames without any ROUTER identity).

    schema : REQUESTS (server side) or REPLIES (client side)
    Raises WireError (code bad_signature, bad_message, stale_clock) before looking at arrays
    whose description, size or signature is wrong.
    """
    if len(frames) < 2:
        raise WireError(f"message has {len(frames)} frame(s); a signature and a header are required", "bad_message")
    if len(frames) > MAX_ARRAYS + 2:
        raise WireError(f"message has {len(frames)} frames (limit {MAX_ARRAYS + 2})", "bad_message")
    views = [memoryview(f) for f in frames]
    total = sum(v.nbytes for v in views)
    if total > MAX_MESSAGE_BYTES or any(v.nbytes > MAX_FRAME_BYTES for v in views):
        raise WireError(f"message of {total} bytes (limit {MAX_MESSAGE_BYTES}, {MAX_FRAME_BYTES} per frame): "
                        "decimate the mesh", "bad_message")
    if views[0].nbytes != SIGNATURE_BYTES or views[1].nbytes > MAX_HEADER_BYTES:
        raise WireError("signature check failed (malformed signature frame)", "bad_signature")
    if not hmac.compare_digest(bytes(views[0]), sign(key, views[1])):
        raise WireError("signature check failed: wrong key, or the message was altered", "bad_signature")

    header = _unpack_header(views[1])
    if set(header) != _HEADER_KEYS:
        raise WireError(f"header fields {sorted(map(str, header))[:9]} differ from the protocol's", "bad_message")
    if header["v"] != PROTOCOL:
        raise WireError(f"peer speaks wire protocol {_short(header['v'])}, this side {PROTOCOL}: "
                        "install matching add-on and solver versions", "bad_version")
    kind, body = header["type"], header["body"]
    if not isinstance(kind, str) or not isinstance(body, dict):
        raise WireError("header type must be a string and body a map", "bad_message")
    _check_plain(body)
    for name in ("session", "boot"):
        if not isinstance(header[name], str) or len(header[name]) > 64:
            raise WireError(f"header {name} must be a short string", "bad_message")
    if not _int(header["seq"]) or not _int(header["re"]) or header["seq"] < 0 or header["re"] < 0:
        raise WireError("header seq and re must be non-negative integers", "bad_message")
    if not _num(header["t"]):
        raise WireError("header time must be a finite number", "bad_message")
    now = time.time() if now is None else now
    if abs(header["t"] - now) > CLOCK_WINDOW_S:
        raise WireError(f"message time is {header['t'] - now:+.0f} s off this machine's clock (window "
                        f"{CLOCK_WINDOW_S:.0f} s): fix the clock or a replayed message", "stale_clock")
    check_body(kind, body, schema)
    arrays, digests = _decode_arrays(kind, header["arrays"], views[2:])
    return Message(kind, body, header["session"], header["seq"], header["boot"], header["re"], float(header["t"]),
                   arrays, digests)


def _decode_arrays(kind: str, descriptors, views) -> dict:
    if not isinstance(descriptors, list) or len(descriptors) != len(views):
        raise WireError(f"header describes {len(descriptors) if isinstance(descriptors, list) else '?'} arrays "
                        f"but {len(views)} array frames arrived", "bad_message")
    if views and kind not in WITH_ARRAYS:
        raise WireError(f"{kind} messages carry no arrays", "bad_message")
    arrays, digests = {}, {}
    for d, view in zip(descriptors, views):
        if not (isinstance(d, list) and len(d) == 4 and isinstance(d[0], str) and isinstance(d[1], str)
                and isinstance(d[2], list) and is_hex64(d[3])):
            raise WireError("array descriptor must be [name, dtype, shape, sha256]", "bad_message")
        name, code, shape, digest = d
        if not _ARRAY_NAME.match(name) or name in arrays:
            raise WireError(f"array name {_short(name)} is not allowed or repeated", "bad_message")
        if code not in DTYPES:
            raise WireError(f"array {name!r} has dtype {_short(code)}; allowed: {' '.join(DTYPES)}", "bad_message")
        if not (1 <= len(shape) <= 2) or not all(_int(s) and 0 <= s <= MAX_DIM for s in shape):
            raise WireError(f"array {name!r} has shape {_short(shape)}: 1 or 2 dimensions of 0..{MAX_DIM}",
                            "bad_message")
        dtype = DTYPES[code]
        expected = dtype.itemsize * math.prod(shape)
        if view.nbytes != expected:
            raise WireError(f"array {name!r} frame has {view.nbytes} bytes, its description says {expected}",
                            "bad_message")
        a = np.frombuffer(view, dtype=dtype) if expected else np.zeros(0, dtype)
        arrays[name] = a.reshape(shape)
        digests[name] = digest
    actual = frame_digests(views)
    for (name, claimed), got in zip(digests.items(), actual):
        if not hmac.compare_digest(claimed, got):
            raise WireError(f"signature check failed: array {name!r} was altered in transit", "bad_signature")
    return arrays, digests


def message_mesh_hash(message: Message) -> str:
    """The content hash of the mesh a message carries, from the digests already checked on arrival."""
    v = message.arrays["vertices"]
    f = message.arrays["faces"]
    return mesh_hash_from_digests(len(v), len(f), message.digests["vertices"], message.digests["faces"])


def mesh_arrays(message: Message) -> tuple[np.ndarray, np.ndarray]:
    """The (vertices, faces) of a submit or mesh message, checked (shapes, finite, index range)."""
    v, f = message.arrays.get("vertices"), message.arrays.get("faces")
    if v is None or f is None:
        raise WireError("message lacks the vertices or faces array", "bad_message")
    if v.dtype != DTYPES["<f8"] or f.dtype != DTYPES["<i4"]:
        raise WireError("vertices must be <f8 and faces <i4 on the wire", "bad_message")
    check_mesh(v, f)
    for name, a in message.arrays.items():
        if name.startswith("value:") and a.shape != (v.shape[0],):
            raise WireError(f"array {name!r} has shape {a.shape}, expected ({v.shape[0]},)", "bad_message")
    face, bary = message.arrays.get("source_face"), message.arrays.get("source_bary")
    if (face is None) != (bary is None):
        raise WireError("source_face and source_bary come together or not at all", "bad_message")
    if face is not None:
        if face.dtype != DTYPES["<i4"] or face.shape != (v.shape[0],):
            raise WireError(f"source_face must be <i4 of shape ({v.shape[0]},), got {face.dtype.str} {face.shape}",
                            "bad_message")
        if bary.dtype != DTYPES["<f4"] or bary.shape != (v.shape[0], 3) or not np.isfinite(bary).all():
            raise WireError(f"source_bary must be finite <f4 of shape ({v.shape[0]}, 3)", "bad_message")
    return v, f
