"""The solver service: a ROUTER socket whose one-thread message loop verifies, dispatches and answers.

Every message is checked (signature, replay, schema, array sizes) before anything runs; a bad
message gets a one-line error and the loop carries on. Pings are answered by this loop itself,
so a wedged loop looks dead to clients (transport heartbeats alone would hide it). Torch is
never imported here: jobs run in worker processes (service/jobs.py).

Admission happens before any message is read: with CURVE, the ZAP handler admits allow-listed
client keys; without, clients log in with PLAIN and a password derived from the connection
file's key (auth.Authenticator). A peer that has not read the connection file cannot make the
server hold a single frame. History is scoped per CURVE client key unless shared_history.
"""

from __future__ import annotations

import os
import sys

if __name__ == "__main__" and not sys.flags.safe_path and os.name == "posix" and sys.version_info >= (3, 11) \
        and not os.environ.get("ISOCLAY_SAFE_PATH_REEXEC"):
    # `python -m` put the working folder first on sys.path: start again with -P before importing
    # anything that a file planted there could shadow (same pid; see service/processes.py)
    # (an empty or relative PYTHONPATH entry names the working folder too: those are dropped)
    _root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    _path = [_root] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if os.path.isabs(p)]
    _env = dict(os.environ, PYTHONSAFEPATH="1", ISOCLAY_SAFE_PATH_REEXEC="1", PYTHONPATH=os.pathsep.join(_path))
    os.execve(sys.executable, [sys.executable, "-P", "-m", "isoclay.service.server", *sys.argv[1:]], _env)

import hmac  # noqa: E402 (after the re-execution above, on purpose)
import json  # noqa: E402
import signal  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402
from dataclasses import dataclass, field  # noqa: E402
from pathlib import Path  # noqa: E402

import msgpack  # noqa: E402
import zmq  # noqa: E402

from .. import __version__, wire  # noqa: E402
from ..errors import InvalidInput, IsoclayError  # noqa: E402
from ..history.blobs import BlobStore  # noqa: E402
from ..history.store import HistoryStore  # noqa: E402
from ..summaries import describe_edit  # noqa: E402
from . import auth, processes  # noqa: E402
from .jobs import JobLimits, JobManager, ServiceError, owns, scoped  # noqa: E402

#: Frames read from one message at most (signature + header + arrays); the rest is drained unread.
MAX_FRAMES = wire.MAX_ARRAYS + 2
#: History replies list at most this many nodes (the newest, plus the current one).
MAX_HISTORY_NODES = 1000
#: Parameters longer than this (as JSON) are left out of history summaries; fetch_node has them all.
MAX_PARAMS_CHARS = 1500


def default_data_dir() -> Path:
    base = os.environ.get("XDG_DATA_HOME")
    return (Path(base) if base else Path.home() / ".local" / "share") / "isoclay"


@dataclass
class ServerConfig:
    """Everything `isoclay serve` sets.

    endpoint : None = 127.0.0.1 on a free port (or the port of an existing connection file)
    curve_secret : key file of the server (create_keypair); with allow_keys enables CURVE + ZAP
    allow_keys : directory of allowed client public keys (*.key)
    shared_history : with CURVE, every allowed key sees every object's history (default: each
        client key sees only the history it made)
    """

    data_dir: Path = field(default_factory=default_data_dir)
    endpoint: str | None = None
    connection_file: Path | None = None
    curve_secret: Path | None = None
    allow_keys: Path | None = None
    shared_history: bool = False
    limits: JobLimits = field(default_factory=JobLimits)


class Server:
    def __init__(self, config: ServerConfig):
        self.config = config
        self.boot_id = wire.new_id()
        self.data_dir = auth.private_dir(config.data_dir)
        self.blobs = BlobStore(self.data_dir / "blobs")
        self.blobs.clean_temporaries()
        self.store = HistoryStore(self.data_dir / "history.sqlite3")
        self.interrupted = self.store.recover()
        self.jobs = JobManager(self.store, self.blobs, self.data_dir / "cache", config.limits, self.data_dir)
        self.guard = auth.ReplayGuard()
        self.stats = {"received": 0, "answered": 0, "rejected": 0, "internal_errors": 0, "oversized": 0,
                      "dropped_unsigned": 0}
        self.rejections: dict[str, int] = {}
        self._stop = threading.Event()
        self._reply_seq = 0
        self._ctx = zmq.Context()
        self._auth = None
        self.endpoint = ""
        self.connection_path: Path | None = None
        self.key = b""
        self.curve_public = None
        self._bind()

    # ---------------------------------------------------------------- set-up

    def _bind(self) -> None:
        cfg = self.config
        curve = None
        if cfg.curve_secret or cfg.allow_keys:
            if not (cfg.curve_secret and cfg.allow_keys):
                raise InvalidInput("CURVE needs both --curve-secret (the server's key file) and --allow-keys "
                                   "(a directory of client *.key files)")
            public, secret = auth.load_keypair(cfg.curve_secret)
            if secret is None:
                raise InvalidInput(f"{cfg.curve_secret} holds no secret key: pass the NAME.key_secret file")
            curve = (public, secret, auth.allowed_public_keys(cfg.allow_keys))
        previous = {}
        if cfg.connection_file and Path(cfg.connection_file).is_file():
            try:
                previous = auth.read_private_json(cfg.connection_file)
            except (InvalidInput, OSError):
                previous = {}
        key_hex = previous.get("key") if wire.is_hex64(previous.get("key")) else wire.new_key()
        endpoint = cfg.endpoint or previous.get("endpoint") or "tcp://127.0.0.1:*"
        auth.check_endpoint(endpoint, curve is not None)
        key = wire.key_bytes(key_hex)
        sock = self._ctx.socket(zmq.ROUTER)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.ROUTER_MANDATORY, 1)  # a reply to a departed client raises instead of vanishing
        sock.setsockopt(zmq.MAXMSGSIZE, wire.MAX_FRAME_BYTES)  # per frame: the transport drops a peer past it
        sock.setsockopt(zmq.HEARTBEAT_IVL, 1000)
        sock.setsockopt(zmq.HEARTBEAT_TIMEOUT, 5000)
        sock.setsockopt(zmq.HEARTBEAT_TTL, 5000)
        sock.setsockopt(zmq.SNDHWM, 1000)
        if auth.is_ipv6(endpoint):
            sock.setsockopt(zmq.IPV6, 1)
        if curve is not None:
            self._auth = auth.Authenticator(self._ctx, public_keys=curve[2])
            sock.curve_server = True
            sock.curve_publickey = curve[0].encode()
            sock.curve_secretkey = curve[1].encode()
            self.curve_public = curve[0]
        else:
            self._auth = auth.Authenticator(self._ctx, password=wire.admission_password(key))
            sock.plain_server = True
        sock.zap_domain = auth.Authenticator.DOMAIN.encode()
        try:
            sock.bind(endpoint)
        except zmq.ZMQError as exc:
            if cfg.endpoint is None and endpoint != "tcp://127.0.0.1:*":
                sock.bind("tcp://127.0.0.1:*")  # the old port is taken: a new one, clients re-read the file
            else:
                sock.close()
                self._auth.stop()
                self._ctx.term()
                raise InvalidInput(_bind_refusal(endpoint, exc)) from None
        self.sock = sock
        self.endpoint = sock.getsockopt_string(zmq.LAST_ENDPOINT)
        self.key = key
        info = {"endpoint": self.endpoint, "key": key_hex, "signature_scheme": "hmac-sha256",
                "protocol": wire.PROTOCOL, "boot_id": self.boot_id, "pid": os.getpid(), "version": __version__}
        if self.curve_public:
            info["curve_server_public"] = self.curve_public
        self.connection_info = info
        if cfg.connection_file:
            self.connection_path = auth.write_private_file(cfg.connection_file, json.dumps(info, indent=1) + "\n")

    # ---------------------------------------------------------------- loop

    def stop(self) -> None:
        self._stop.set()

    def serve_forever(self) -> None:
        poller = zmq.Poller()
        poller.register(self.sock, zmq.POLLIN)
        try:
            while not self._stop.is_set():
                if poller.poll(20):
                    for _ in range(64):
                        try:
                            received = self._receive()
                        except zmq.Again:
                            break
                        if received is not None:
                            self._handle(*received)
                        received = None  # keep no reference: a large message is freed now, not next turn
                self.jobs.pump()
        finally:
            self.close()

    def close(self) -> None:
        self.jobs.shutdown()
        self.store.recover()  # jobs still running become interrupted, resumable after a restart
        self.sock.close(linger=0)
        if self._auth is not None:
            self._auth.stop()
        self._ctx.term()
        self.store.close()

    def _receive(self):
        """(identity, frames) of one message, or None if it was refused while reading.

        Frames past MAX_FRAMES, and every frame after a header whose signature fails, are read
        and dropped at once (ZeroMQ hands a message over only whole), so none is kept.
        """
        identity = self.sock.recv(flags=zmq.NOBLOCK, copy=False)
        frames, more, count, forged = [], identity.more, 0, False
        while more:
            frame = self.sock.recv(copy=False)
            more = frame.more
            count += 1
            if forged or count > MAX_FRAMES:
                continue
            frames.append(frame)
            if count == 2 and more and not _signed(self.key, frames):
                forged, frames = True, []
        self.stats["received"] += 1
        if forged:
            self.stats["dropped_unsigned"] += 1
            self._reject(identity, None, wire.WireError("signature check failed", "bad_signature"))
            return None
        if count > MAX_FRAMES:
            self.stats["oversized"] += 1
            self._reject(identity, None, wire.WireError(f"message has more than {MAX_FRAMES} frames", "bad_message"))
            return None
        return identity, frames

    def _handle(self, identity, frames) -> None:
        try:
            msg = wire.decode(self.key, frames, wire.REQUESTS)
        except wire.WireError as exc:
            self._reject(identity, frames, exc)
            return
        except Exception as exc:  # a decoder bug must not take the server down
            self.stats["internal_errors"] += 1
            self._reject(identity, frames, wire.WireError(f"undecodable message ({type(exc).__name__})"))
            return
        signature = bytes(frames[0])
        verdict, cached = self.guard.classify(msg.session, msg.seq, signature)
        if verdict == "replay":
            self._reply_error(identity, msg, "replay", "message sequence number already used: a replayed message")
            return
        if verdict == "retry" and cached is not None:
            self._send(identity, cached)
            return
        if msg.type in wire.NEEDS_BOOT and msg.boot != self.boot_id:
            self.guard.record(msg.session, msg.seq, signature, None)
            self._reply_error(identity, msg, "stale_boot", "the solver restarted since this client's last ping: "
                                                           "ping and send again")
            return
        digests = None
        try:
            reply = self._dispatch(msg, self._owner(frames[0]))
            kind, body, arrays = reply[:3]
            digests = reply[3] if len(reply) > 3 else None
        except ServiceError as exc:
            kind, body, arrays = "error", {"code": exc.code, "message": _one_line(exc)}, None
        except IsoclayError as exc:
            kind, body, arrays = "error", {"code": "invalid_input", "message": _one_line(exc)}, None
        except Exception as exc:
            self.stats["internal_errors"] += 1
            kind, body, arrays = "error", {"code": "bad_message",
                                           "message": f"internal error ({type(exc).__name__}: {_one_line(exc)[:150]})"}, None
        reply = self._encode(msg, kind, body, arrays, digests)
        self.guard.record(msg.session, msg.seq, signature, reply if msg.type in wire.NEEDS_BOOT else None)
        self._send(identity, reply)
        self.stats["answered"] += 1

    def _owner(self, frame) -> str:
        """Whose history a message may touch: its CURVE client key, or "" (shared) without CURVE."""
        if self.curve_public is None or self.config.shared_history:
            return ""
        return frame.get("User-Id") or "?"  # ZAP sets it for every admitted CURVE peer

    def _dispatch(self, msg: wire.Message, owner: str = ""):
        b = msg.body
        t = msg.type
        if t == "ping":
            return "pong", {"boot_id": self.boot_id, "version": __version__, "protocol": wire.PROTOCOL,
                            "server_time": time.time(), "queued": len(self.jobs.queue),
                            "running": self.jobs.running()}, None
        if t == "submit":
            return "job", self.jobs.submit(msg, owner), None
        if t == "poll":
            return "job", self.jobs.poll(b["job_id"], owner), None
        if t == "cancel":
            return "job", self.jobs.cancel(b["job_id"], owner), None
        if t == "resume":
            return "job", self.jobs.resume(b["job_id"], owner), None
        if t == "result":
            return ("mesh", *self.jobs.result(b["job_id"], owner))
        if t == "fetch_node":
            return ("mesh", *self.jobs.node_mesh(b["node_id"], owner))
        source = scoped(owner, b.get("source_key", ""))
        if t == "undo":
            self.store.undo(source)
        elif t == "redo":
            self.store.redo(source)
        elif t == "checkout":
            node = self.store.node(b["node_id"]) if b["node_id"] else None
            if b["node_id"] and (node is None or not owns(owner, node.source_key) or node.source_key != source):
                raise ServiceError("invalid_input", f"node {b['node_id']} is not in the history of "
                                                    f"{b['source_key']!r}: list it with history first")
            self.store.checkout(source, b["node_id"])
        current = self.store.current(source)
        rows = self.store.nodes(source)
        if len(rows) > MAX_HISTORY_NODES:  # the newest ones, and always the current node
            keep = rows[-MAX_HISTORY_NODES:]
            keep += [n for n in rows[:-MAX_HISTORY_NODES] if n.node_id == current]
            rows = sorted(keep, key=lambda n: n.finished)
        # "summary" says what each edit was (summaries.describe_edit), so no client needs the bulky parameters
        nodes = [_compact(dict(n.summary(current), summary=describe_edit(n.task, n.params))) for n in rows]
        return "history", {"source_key": b["source_key"], "current": current, "nodes": nodes}, None

    # ---------------------------------------------------------------- replies

    def _encode(self, msg: wire.Message, kind: str, body: dict, arrays=None, digests=None) -> list:
        self._reply_seq += 1
        return wire.encode(self.key, kind, body, arrays, session=msg.session, seq=self._reply_seq, boot=self.boot_id,
                           re=msg.seq, digests=digests)

    def _reply_error(self, identity, msg: wire.Message, code: str, message: str) -> None:
        self.stats["rejected"] += 1
        self.rejections[code] = self.rejections.get(code, 0) + 1
        self._send(identity, self._encode(msg, "error", {"code": code, "message": message}))

    def _reject(self, identity, frames, exc: wire.WireError) -> None:
        """Answer a message that failed decoding: unsigned for bad signatures, else signed with what we can read."""
        self.stats["rejected"] += 1
        self.rejections[exc.code] = self.rejections.get(exc.code, 0) + 1
        if exc.code == "bad_signature":
            self._send(identity, wire.encode_unsigned_error())
            return
        session, seq = _peek_session(frames, self.key)
        stub = wire.Message("error", {}, session=session, seq=seq)
        self._send(identity, self._encode(stub, "error", {"code": exc.code, "message": _one_line(exc)}))

    def _send(self, identity, frames) -> None:
        try:
            self.sock.send_multipart([identity, *frames], flags=zmq.NOBLOCK, copy=False)
        except zmq.ZMQError:  # the client left (ROUTER_MANDATORY) or its queue is full: drop the reply
            pass


def _compact(summary: dict) -> dict:
    """A node summary small enough for long histories: bulky parameters (handle lists) are left out."""
    text = json.dumps(summary["params"])
    if len(text) > MAX_PARAMS_CHARS:
        summary = dict(summary, params={"omitted_bytes": len(text)})
    return summary


def _signed(key: bytes, frames) -> bool:
    """True if frames[1] (the header) carries a valid signature in frames[0]."""
    signature, header = memoryview(frames[0]), memoryview(frames[1])
    return (signature.nbytes == wire.SIGNATURE_BYTES and header.nbytes <= wire.MAX_HEADER_BYTES
            and hmac.compare_digest(bytes(signature), wire.sign(key, header)))


def _bind_refusal(endpoint: str, exc: zmq.ZMQError) -> str:
    if auth.is_ipv6(endpoint):
        return (f"cannot listen on {endpoint}: this machine offers no IPv6 at that address ({exc}): "
                "use tcp://127.0.0.1:PORT")
    if exc.errno == zmq.EADDRINUSE:
        return f"cannot listen on {endpoint}: the port is in use: pick another port, or :* for a free one"
    return f"cannot listen on {endpoint} ({exc}): give an address of this machine, e.g. tcp://127.0.0.1:PORT"


def _peek_session(frames, key: bytes) -> tuple[str, int]:
    """Session and seq of a signed but otherwise bad message, for addressing the error reply.

    Only a header whose signature verifies is parsed here; anything else gets an anonymous reply.
    """
    try:
        if frames is None or len(frames) < 2 or not _signed(key, frames):
            return "", 0
        header = msgpack.unpackb(bytes(frames[1]), raw=False, max_bin_len=0, max_ext_len=0)
        session, seq = header.get("session", ""), header.get("seq", 0)
        if isinstance(session, str) and len(session) <= 64 and isinstance(seq, int) and 0 <= seq < 2**63:
            return session, seq
    except Exception:  # anything unreadable: an anonymous error reply
        pass
    return "", 0


def _one_line(exc) -> str:
    return " ".join(str(exc).split())[:400]


def run_server(config: ServerConfig, on_ready=None, watch_stdin: bool = False) -> int:
    """Serve until SIGTERM/SIGINT (main thread), standard input closes (watch_stdin) or stop().

    The process's files are private (umask 0o077: history, its -wal/-shm, blobs, cache, logs),
    the working folder leaves sys.path (children inherit PYTHONSAFEPATH=1), and the parameter
    checker loads as soon as the solver is idle (jobs.CHECKER_PRELOAD_AFTER_S).
    """
    os.umask(0o077)
    processes.drop_working_folder()
    server = Server(config)
    server.jobs.preload_checker = True
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, lambda *_: server.stop())
    if watch_stdin:
        def watch():
            try:
                while sys.stdin.buffer.read(65536):
                    pass
            except (OSError, ValueError):
                pass
            server.stop()

        threading.Thread(target=watch, name="isoclay-stdin-watch", daemon=True).start()
    if on_ready:
        on_ready(server)
    server.serve_forever()
    return 0


def main(argv=None) -> int:
    """`python -m isoclay.service.server ...`: the same options as `isoclay serve`, without the CLI's imports."""
    from . import launch

    return launch.main(argv)


if __name__ == "__main__":
    raise SystemExit(main())
