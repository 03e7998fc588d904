"""Client of the isoclay solver service: a DEALER socket with timeouts, bounded retries and restart detection.

No bpy, no torch: the Blender add-on build copies this file and wire.py verbatim (they import each
other relatively). Every call returns or raises within a bounded time, so Blender never freezes;
``poll`` returns within about 50 ms. Only replies signed with the connection file's key count;
the socket logs in with the admission password (or CURVE keys) the solver asks for. See docs/wire.md.
"""

from __future__ import annotations

import json
import os
import stat
import time
from dataclasses import dataclass, field

import numpy as np
import zmq

from . import wire


class ClientError(Exception):
    """Something went wrong talking to the solver; ``str()`` is one line fit for a UI report."""


class SolverUnreachable(ClientError):
    """No trusted reply after the bounded retries: nothing answered, or only replies that are not
    signed with our key (which anyone can send, so they never count as an answer)."""


class KeyRejected(ClientError):
    """Our key is known to be the problem: the solver said so over CURVE (which proves it is the
    solver named in the connection file), or the connection file now holds another key."""


class RemoteError(ClientError):
    """The solver refused a request; ``code`` names the kind (invalid_mesh, unknown_job, busy...)."""

    def __init__(self, code: str, message: str):
        super().__init__(message)
        self.code = code


class JobFailed(RemoteError):
    """The result of a job that failed or was cancelled was asked for."""


@dataclass(frozen=True)
class MeshRecord:
    """A mesh coming back from the solver (arrays are read-only views: copy before mutating).

    vertices : (n, 3) float64, world units
    faces : (m, 3) int64
    vertex_values : name -> (n,) float32 (e.g. "stretch", "bend")
    source_face : (n,) int32 or None: per vertex, the face of the edit's input mesh (as sent) it
        came from (-1: none); source_bary : (n, 3) float32 or None: weights of that face's corners
    """

    vertices: np.ndarray
    faces: np.ndarray
    vertex_values: dict
    metrics: dict
    report: dict
    node_id: str
    job_id: str | None = None
    task: str = ""
    warnings: tuple = ()
    source_face: np.ndarray | None = None
    source_bary: np.ndarray | None = None


@dataclass
class _Pending:
    seq: int
    frames: list
    sent_at: float = 0.0
    extra: dict = field(default_factory=dict)


def load_connection(source) -> dict:
    """A connection dict from a path (JSON, must not be readable by others) or a dict."""
    if isinstance(source, dict):
        info = dict(source)
        where = "connection info"
    else:
        path = os.path.expanduser(os.fspath(source))
        where = path
        try:
            st = os.stat(path)
        except OSError as exc:
            raise ClientError(f"cannot read the connection file {path} ({exc.strerror}): start the solver "
                              "with `isoclay serve` or pick the right file") from None
        if os.name == "posix" and st.st_mode & 0o077:
            raise ClientError(f"connection file {path} is readable by other users (mode "
                              f"{stat.S_IMODE(st.st_mode):o}): run `chmod 600 {path}`")
        try:
            with open(path, encoding="utf-8") as handle:
                info = json.load(handle)
        except (OSError, ValueError) as exc:
            raise ClientError(f"connection file {path} is not valid JSON ({type(exc).__name__}): "
                              "restart the solver to rewrite it") from None
    if not isinstance(info, dict):
        raise ClientError(f"{where} must be a JSON object with endpoint and key")
    endpoint = info.get("endpoint")
    if not isinstance(endpoint, str) or not endpoint.startswith(("tcp://", "ipc://")):
        raise ClientError(f"{where} has no usable endpoint (tcp://host:port): restart the solver")
    if not wire.is_hex64(info.get("key")):
        raise ClientError(f"{where} has no valid key (64 hex characters): restart the solver")
    curve = [info.get(k) for k in ("curve_server_public", "curve_client_public", "curve_client_secret")]
    if any(curve) and not all(isinstance(c, str) and len(c) == 40 for c in curve):
        raise ClientError(f"{where} has incomplete CURVE keys: it needs curve_server_public, "
                          "curve_client_public and curve_client_secret (40 z85 characters each)")
    return info


class SolverClient:
    """Talk to one solver. Not thread-safe: use it from one thread.

    ``poll`` never blocks longer than ``poll_timeout_s``; every other call may block up to
    ``timeout_s * (retries + 1)`` when the solver is unreachable, so on a UI thread use small
    timeouts (or keep the client on a worker thread and hand results over).

    connection : path of a connection file, or a dict with endpoint, key and optional CURVE keys
    timeout_s : how long one request waits for its reply
    retries : extra attempts, each on a rebuilt socket (Lazy Pirate pattern, ZeroMQ guide ch. 4)
    poll_timeout_s : how long ``poll`` waits before returning the cached state
    """

    def __init__(self, connection, timeout_s: float = 5.0, retries: int = 3, poll_timeout_s: float = 0.05):
        info = load_connection(connection)
        self.endpoint = info["endpoint"]
        self._path = None if isinstance(connection, dict) else os.path.expanduser(os.fspath(connection))
        self._key_hex = info["key"]
        self._key = wire.key_bytes(info["key"])
        self._untrusted = 0  # replies in the current request that our key does not sign
        self._curve = (info.get("curve_server_public"), info.get("curve_client_public"),
                       info.get("curve_client_secret"))
        self.timeout_s = float(timeout_s)
        self.retries = max(0, int(retries))
        self.poll_timeout_s = float(poll_timeout_s)
        self.session = wire.new_id()
        self.boot_id = ""
        self.server_restarted = False
        self._seq = 0
        self._ctx = zmq.Context()
        self._sock = None
        self._jobs: dict[str, dict] = {}
        self._last_contact = time.monotonic()
        self._build_socket()

    # -------------------------------------------------------------- socket plumbing

    def _build_socket(self) -> None:
        if self._sock is not None:
            self._sock.close(linger=0)
        s = self._ctx.socket(zmq.DEALER)
        s.setsockopt(zmq.LINGER, 0)
        s.setsockopt(zmq.IMMEDIATE, 1)  # do not queue requests for a server that is not there
        s.setsockopt(zmq.HEARTBEAT_IVL, 1000)
        s.setsockopt(zmq.HEARTBEAT_TIMEOUT, 5000)
        s.setsockopt(zmq.RECONNECT_IVL, 100)
        s.setsockopt(zmq.RECONNECT_IVL_MAX, 2000)
        if self.endpoint.startswith("tcp://["):
            s.setsockopt(zmq.IPV6, 1)
        if all(self._curve):
            s.curve_serverkey = self._curve[0].encode()
            s.curve_publickey = self._curve[1].encode()
            s.curve_secretkey = self._curve[2].encode()
        else:  # the solver admits only clients that know the connection file (wire.admission_password)
            s.plain_username = wire.ADMISSION_USER.encode()
            s.plain_password = wire.admission_password(self._key).encode()
        s.connect(self.endpoint)
        self._sock = s

    def close(self) -> None:
        """Close the socket; the client cannot be used afterwards."""
        if self._sock is not None:
            self._sock.close(linger=0)
            self._sock = None
        if self._ctx is not None:
            self._ctx.term()
            self._ctx = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def _encode(self, kind: str, body: dict, arrays=None, digests=None) -> _Pending:
        self._seq += 1
        frames = wire.encode(self._key, kind, body, arrays, session=self.session, seq=self._seq, boot=self.boot_id,
                             digests=digests)
        return _Pending(self._seq, frames)

    def _send(self, pending: _Pending, deadline: float) -> bool:
        if self._sock is None:
            raise ClientError("the client is closed: create a new SolverClient")
        remaining = max(0, int((deadline - time.monotonic()) * 1000))
        if not (self._sock.poll(remaining, zmq.POLLOUT) & zmq.POLLOUT):
            return False
        try:
            self._sock.send_multipart(pending.frames, flags=zmq.NOBLOCK, copy=False)
        except zmq.Again:
            return False
        pending.sent_at = time.monotonic()
        return True

    def _receive(self, pending: _Pending, deadline: float) -> wire.Message | None:
        """The reply to ``pending``, or None at the deadline; late replies to older requests are dropped."""
        while True:
            remaining = int((deadline - time.monotonic()) * 1000)
            if remaining < 0 or not self._sock.poll(max(0, remaining), zmq.POLLIN):
                return None
            frames = self._sock.recv_multipart(copy=False)
            try:
                msg = wire.decode(self._key, frames, wire.REPLIES)
            except wire.WireError as exc:
                if exc.code == "bad_signature":
                    # Not signed with our key: anyone can send that, so it is ignored, never an answer.
                    # Over CURVE only the solver of the connection file can talk to us at all, so
                    # its "bad signature" is believed.
                    self._untrusted += 1
                    if all(self._curve) and wire.peek_unsigned_error(frames) is not None:
                        raise KeyRejected("the solver could not verify our signature: the connection file's "
                                          "key is out of date; use the solver's current connection file") from None
                    continue
                # The signature is checked first, so these come from the real solver: say what is wrong.
                if exc.code == "stale_clock":
                    raise ClientError("this machine's clock and the solver's differ by more than "
                                      f"{wire.CLOCK_WINDOW_S / 60:.0f} minutes: synchronise the clocks (NTP)") from None
                if exc.code == "bad_version":
                    raise ClientError(str(exc)) from None
                continue  # a reply we cannot verify is treated as never received
            if msg.session != self.session:
                continue
            self._last_contact = time.monotonic()
            if msg.boot and msg.boot != self.boot_id:
                if self.boot_id:
                    self.server_restarted = True
                self.boot_id = msg.boot
            if msg.type == "job":
                self._remember_job(msg.body)
            if msg.re == pending.seq:
                return msg

    def _request(self, kind: str, body: dict, arrays=None, *, timeout_s: float | None = None,
                 retries: int | None = None, digests: dict | None = None) -> wire.Message:
        """Send, wait, retry on a fresh socket (same frames: the server answers a repeat from its cache)."""
        timeout_s = self.timeout_s if timeout_s is None else timeout_s
        retries = self.retries if retries is None else retries
        pending = self._encode(kind, body, arrays, digests)
        self._untrusted = 0
        for attempt in range(retries + 1):
            deadline = time.monotonic() + timeout_s
            if self._send(pending, deadline):
                msg = self._receive(pending, deadline)
                if msg is not None:
                    return self._check_reply(kind, body, arrays, msg, timeout_s, digests)
            self._build_socket()
        raise self._unreachable(f"no reply from the solver at {self.endpoint} after {retries + 1} tries of "
                                f"{timeout_s:g} s: start it with `isoclay serve`, or check that the connection "
                                "file is the solver's current one (a solver admits only clients with its key)")

    def _unreachable(self, text: str) -> ClientError:
        """The error for "no trusted reply": KeyRejected if the connection file's key changed since we
        read it, else SolverUnreachable (saying so when untrusted replies came instead)."""
        if self._path is not None:
            try:
                current = load_connection(self._path).get("key")
            except ClientError:
                current = None
            if current is not None and current != self._key_hex:
                return KeyRejected(f"the connection file {self._path} now holds another key (the solver restarted "
                                   "with a new one): connect again to use it")
        if self._untrusted:
            return SolverUnreachable(f"the program at {self.endpoint} answered {self._untrusted} time(s) without "
                                     "this connection file's signature (untrusted replies, ignored): it may not be "
                                     "the solver; restart the solver and use its current connection file")
        return SolverUnreachable(text)

    def _check_reply(self, kind, body, arrays, msg, timeout_s, digests):
        if msg.type != "error":
            return msg
        code, text = msg.body["code"], msg.body["message"]
        if code == "stale_boot":  # the server restarted since our last ping: learn its boot id, resend once
            self.ping()
            again = self._encode(kind, body, arrays, digests)
            deadline = time.monotonic() + timeout_s
            if self._send(again, deadline):
                reply = self._receive(again, deadline)
                if reply is not None and reply.type != "error":
                    return reply
                if reply is not None:
                    code, text = reply.body["code"], reply.body["message"]
            else:
                raise SolverUnreachable(f"the solver at {self.endpoint} restarted and stopped answering")
        if code in ("job_failed",):
            raise JobFailed(code, text)
        raise RemoteError(code, text)

    def _remember_job(self, state: dict) -> None:
        state = dict(state)
        state["stale"] = False
        state["boot_id"] = self.boot_id
        self._jobs[state["job_id"]] = state

    # -------------------------------------------------------------- public API

    def ping(self, timeout_s: float | None = None) -> dict:
        """Liveness check answered by the server's message loop: boot_id, version, protocol, queue sizes."""
        msg = self._request("ping", {}, timeout_s=timeout_s)
        return dict(msg.body)

    def submit(self, job_id: str, task: str, params: dict, vertices=None, faces=None, source_key: str = "",
               parent_node: str | None = None, arrays: dict | None = None) -> dict:
        """Start an edit; idempotent on ``job_id`` (a known id returns the existing job).

        vertices : (n, 3) float32/float64 world units, faces : (m, 3) int32/int64; both may be
        None when ``parent_node`` is given (the edit then starts from that node's result).
        The mesh is uploaded only if the server lacks its content hash.
        arrays : more array frames sent with every attempt, e.g. a deform's handle groups as
            ``handles:<i>`` ((k, 3) float64, world units; params["groups"][i] holds the transform)
        """
        if self.boot_id == "":
            self.ping()
        body = {"job_id": job_id, "task": task, "params": params, "source_key": source_key,
                "parent_node": parent_node, "mesh_hash": None}
        extra = {name: np.ascontiguousarray(a, dtype="<f8" if name.startswith("handles:") else None)
                 for name, a in (arrays or {}).items()}
        arrays = digests = None
        if vertices is not None or faces is not None:
            if vertices is None or faces is None:
                raise ClientError("submit needs both vertices and faces, or neither with parent_node")
            try:
                v, f = wire.canonical_mesh(vertices, faces)
                wire.check_mesh(v, f)
            except wire.WireError as exc:
                raise RemoteError(exc.code, str(exc)) from None
            digests = dict(zip(("vertices", "faces"), wire.frame_digests([v, f])))
            body["mesh_hash"] = wire.mesh_hash_from_digests(len(v), len(f), digests["vertices"], digests["faces"])
            arrays = {"vertices": v, "faces": f}
        elif parent_node is None:
            raise ClientError("submit needs a mesh (vertices and faces) or a parent_node to start from")
        try:
            msg = self._request("submit", body, extra or None)
        except RemoteError as exc:
            if exc.code != "need_mesh" or arrays is None:
                raise
            msg = self._request("submit", body, {**arrays, **extra}, digests=digests)
        return dict(self._jobs.get(job_id, msg.body))

    def poll(self, job_id: str) -> dict:
        """The job's state, within about ``poll_timeout_s``; ``stale`` is True when the answer is cached.

        Raises SolverUnreachable only after ``timeout_s * (retries + 1)`` without any reply.
        """
        pending = self._encode("poll", {"job_id": job_id})
        deadline = time.monotonic() + self.poll_timeout_s
        msg = self._receive(pending, deadline) if self._send(pending, deadline) else None
        if msg is not None:
            if msg.type == "error":
                raise RemoteError(msg.body["code"], msg.body["message"])
            return dict(self._jobs[job_id])
        silent = time.monotonic() - self._last_contact
        if silent > self.timeout_s * (self.retries + 1):
            self._last_contact = time.monotonic()
            self._build_socket()
            error = self._unreachable(f"the solver at {self.endpoint} has not answered for {silent:.0f} s: "
                                      "it may have stopped; restart it and resubmit")
            self._untrusted = 0
            raise error
        if silent > self.timeout_s:
            self._build_socket()  # Lazy Pirate: a fresh socket for the next try
        cached = dict(self._jobs.get(job_id) or {"job_id": job_id, "state": "queued", "stage": "", "fraction": 0.0,
                                                 "info": {}, "error": None, "node_id": None, "task": "",
                                                 "source_key": "", "warnings": [], "boot_id": self.boot_id})
        cached["stale"] = True
        return cached

    def wait(self, job_id: str, progress=None, timeout_s: float | None = None, interval_s: float = 0.1) -> dict:
        """Block until the job ends (headless use); ``progress(state)`` is called on each change."""
        start, last = time.monotonic(), None
        while True:
            state = self.poll(job_id)
            key = (state["state"], state["stage"], round(state["fraction"], 3))
            if progress is not None and key != last and not state["stale"]:
                progress(state)
                last = key
            if state["state"] in wire.FINAL_STATES and not state["stale"]:
                return state
            if timeout_s is not None and time.monotonic() - start > timeout_s:
                raise ClientError(f"job {job_id} still {state['state']} after {timeout_s:g} s")
            time.sleep(interval_s)

    def cancel(self, job_id: str) -> None:
        """Ask the job to stop; it ends as cancelled within 2 s (poll to see it)."""
        self._request("cancel", {"job_id": job_id})

    def resume(self, job_id: str) -> dict:
        """Start an interrupted job again (same id, same inputs)."""
        return dict(self._request("resume", {"job_id": job_id}).body)

    def result(self, job_id: str) -> MeshRecord:
        """The result mesh of a finished job (raises JobFailed if it failed or was cancelled)."""
        return _record(self._request("result", {"job_id": job_id}))

    def fetch_node(self, node_id: str) -> MeshRecord:
        """The result mesh stored in any history node."""
        return _record(self._request("fetch_node", {"node_id": node_id}))

    def history(self, source_key: str) -> list[dict]:
        """The edit nodes of one source object, oldest first, with ``current`` marking the pointer."""
        return list(self._request("history", {"source_key": source_key}).body["nodes"])

    def current(self, source_key: str) -> str:
        """The current node id of a source ("" = the original mesh)."""
        return self._request("history", {"source_key": source_key}).body["current"]

    def undo(self, source_key: str) -> str:
        """Move the source's pointer to the parent node; returns the new current id ("" = original)."""
        return self._request("undo", {"source_key": source_key}).body["current"]

    def redo(self, source_key: str) -> str:
        """Move the pointer forward again to the child last undone (or the newest child)."""
        return self._request("redo", {"source_key": source_key}).body["current"]

    def checkout(self, source_key: str, node_id: str) -> str:
        """Point the source at any of its nodes ("" = the original); nothing is deleted."""
        return self._request("checkout", {"source_key": source_key, "node_id": node_id}).body["current"]

    def branch_from(self, node_id: str, job_id: str, task: str, params: dict, source_key: str) -> dict:
        """Edit again starting from a stored node's field and result mesh."""
        return self.submit(job_id, task, params, None, None, source_key=source_key, parent_node=node_id)


def _record(msg: wire.Message) -> MeshRecord:
    try:
        v, f = wire.mesh_arrays(msg)
    except wire.WireError as exc:
        raise RemoteError(exc.code, f"the solver sent a bad mesh: {exc}") from None
    values = {name[6:]: a for name, a in msg.arrays.items() if name.startswith("value:")}
    b = msg.body
    return MeshRecord(v, f, values, dict(b["metrics"]), dict(b["report"]), b["node_id"], b["job_id"], b["task"],
                      tuple(b["warnings"]), msg.arrays.get("source_face"), msg.arrays.get("source_bary"))
