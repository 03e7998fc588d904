"""The solver service: a ROUTER socket whose one-thread message loop verifies, dispatches and answers.

Every message is checked (signature, replay, schema, array sizes) before anything runs; a bad
message gets a one-line error and the loop carries on. Pings are answered by this loop itself,
so a wedged loop looks dead to clients (transport heartbeats alone would hide it). Torch is
never imported here: jobs run in worker processes (service/jobs.py).
"""

from __future__ import annotations

import json
import os
import signal
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import msgpack
import zmq

from .. import __version__, wire
from ..errors import InvalidInput, IsoclayError
from ..history.blobs import BlobStore
from ..history.store import HistoryStore
from ..summaries import describe_edit
from . import auth
from .jobs import JobLimits, JobManager, ServiceError

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
    """

    data_dir: Path = field(default_factory=default_data_dir)
    endpoint: str | None = None
    connection_file: Path | None = None
    curve_secret: Path | None = None
    allow_keys: Path | None = None
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
        self.jobs = JobManager(self.store, self.blobs, self.data_dir / "cache", config.limits)
        self.guard = auth.ReplayGuard()
        self.stats = {"received": 0, "answered": 0, "rejected": 0, "internal_errors": 0, "oversized": 0}
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
        sock = self._ctx.socket(zmq.ROUTER)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.ROUTER_MANDATORY, 1)  # a reply to a departed client raises instead of vanishing
        sock.setsockopt(zmq.MAXMSGSIZE, wire.MAX_MESSAGE_BYTES)
        sock.setsockopt(zmq.HEARTBEAT_IVL, 1000)
        sock.setsockopt(zmq.HEARTBEAT_TIMEOUT, 5000)
        sock.setsockopt(zmq.HEARTBEAT_TTL, 5000)
        sock.setsockopt(zmq.SNDHWM, 1000)
        if curve is not None:
            self._auth = auth.Authenticator(self._ctx, curve[2])
            sock.curve_server = True
            sock.curve_publickey = curve[0].encode()
            sock.curve_secretkey = curve[1].encode()
            sock.zap_domain = auth.Authenticator.DOMAIN.encode()
            self.curve_public = curve[0]
        try:
            sock.bind(endpoint)
        except zmq.ZMQError as exc:
            if cfg.endpoint is None and endpoint != "tcp://127.0.0.1:*":
                sock.bind("tcp://127.0.0.1:*")  # the old port is taken: a new one, clients re-read the file
            else:
                sock.close()
                raise InvalidInput(f"cannot listen on {endpoint} ({exc}): pick another port") from None
        self.sock = sock
        self.endpoint = sock.getsockopt_string(zmq.LAST_ENDPOINT)
        self.key = wire.key_bytes(key_hex)
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
                            frames = self._receive()
                        except zmq.Again:
                            break
                        if frames is not None:
                            self._handle(*frames)
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
        """(identity, frames) of one message, or None if it had too many frames (drained unread)."""
        identity = self.sock.recv(flags=zmq.NOBLOCK, copy=False)
        frames, more = [], identity.more
        while more:
            frame = self.sock.recv(copy=False)
            more = frame.more
            if len(frames) <= MAX_FRAMES:
                frames.append(frame)
        self.stats["received"] += 1
        if len(frames) > MAX_FRAMES:
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
            reply = self._dispatch(msg)
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

    def _dispatch(self, msg: wire.Message):
        b = msg.body
        t = msg.type
        if t == "ping":
            return "pong", {"boot_id": self.boot_id, "version": __version__, "protocol": wire.PROTOCOL,
                            "server_time": time.time(), "queued": len(self.jobs.queue),
                            "running": self.jobs.running()}, None
        if t == "submit":
            return "job", self.jobs.submit(msg), None
        if t == "poll":
            return "job", self.jobs.poll(b["job_id"]), None
        if t == "cancel":
            return "job", self.jobs.cancel(b["job_id"]), None
        if t == "resume":
            return "job", self.jobs.resume(b["job_id"]), None
        if t == "result":
            return ("mesh", *self.jobs.result(b["job_id"]))
        if t == "fetch_node":
            return ("mesh", *self.jobs.node_mesh(b["node_id"]))
        source = b.get("source_key", "")
        if t == "undo":
            self.store.undo(source)
        elif t == "redo":
            self.store.redo(source)
        elif t == "checkout":
            self.store.checkout(source, b["node_id"])
        current = self.store.current(source)
        rows = self.store.nodes(source)
        if len(rows) > MAX_HISTORY_NODES:  # the newest ones, and always the current node
            keep = rows[-MAX_HISTORY_NODES:]
            keep += [n for n in rows[:-MAX_HISTORY_NODES] if n.node_id == current]
            rows = sorted(keep, key=lambda n: n.finished)
        # "summary" says what each edit was (summaries.describe_edit), so no client needs the bulky parameters
        nodes = [_compact(dict(n.summary(current), summary=describe_edit(n.task, n.params))) for n in rows]
        return "history", {"source_key": source, "current": current, "nodes": nodes}, None

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


def _peek_session(frames, key: bytes) -> tuple[str, int]:
    """Session and seq of a signed but otherwise bad message, for addressing the error reply.

    Only a header whose signature verifies is parsed here; anything else gets an anonymous reply.
    """
    import hmac

    try:
        if (frames is None or len(frames) < 2 or memoryview(frames[1]).nbytes > wire.MAX_HEADER_BYTES
                or not hmac.compare_digest(bytes(frames[0]), wire.sign(key, frames[1]))):
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
    """Serve until SIGTERM/SIGINT (main thread), standard input closes (watch_stdin) or stop()."""
    import sys

    server = Server(config)
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
    import argparse
    import sys

    from ..commands import serve

    parser = argparse.ArgumentParser(prog="isoclay-serve", description=serve.DESCRIPTION,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    serve.add_arguments(parser)
    args = parser.parse_args(argv)
    try:
        return serve.run(args, None)
    except IsoclayError as exc:
        sys.stderr.write(f"isoclay: {exc}\n")
        return exc.exit_code


if __name__ == "__main__":
    raise SystemExit(main())
