"""Security: forged, tampered and replayed messages; CURVE with a ZAP allow-list; loopback-only by default; file modes."""

from __future__ import annotations

import argparse
import json
import os
import stat
import time

import numpy as np
import pytest
import zmq

from service_support import ServerThread, fresh_id, tetrahedron
from isoclay import wire
from isoclay.client import ClientError, KeyRejected, SolverClient, SolverUnreachable
from isoclay.errors import InvalidInput
from isoclay.service import auth
from isoclay.service.jobs import JobLimits
from isoclay.service.server import Server, ServerConfig


class Raw:
    """A bare DEALER for sending hand-made frames."""

    def __init__(self, endpoint):
        self.ctx = zmq.Context()
        self.s = self.ctx.socket(zmq.DEALER)
        self.s.setsockopt(zmq.LINGER, 0)
        self.s.connect(endpoint)

    def ask(self, frames, timeout_ms=3000):
        self.s.send_multipart(frames)
        return self.s.recv_multipart() if self.s.poll(timeout_ms) else None

    def close(self):
        self.s.close()
        self.ctx.term()


def test_forged_key_is_rejected_and_the_client_reports_key_rejected(live):
    info = live.connection
    info["key"] = wire.new_key()
    c = SolverClient(info, timeout_s=2, retries=0)
    with pytest.raises(KeyRejected) as err:
        c.ping()
    assert "connection file" in str(err.value)
    c.close()


def test_tampered_frames_are_rejected_and_run_nothing(live):
    v, f = wire.canonical_mesh(*tetrahedron())
    job = fresh_id()
    body = {"job_id": job, "task": "echo", "params": {}, "source_key": "tamper", "parent_node": None, "mesh_hash": None}
    raw = Raw(live.server.endpoint)
    rng = np.random.default_rng(5)
    try:
        session = wire.new_id()
        for seq in range(1, 121):  # random single-bit flips spread over every frame (all bits: test_service_wire)
            frames = [bytes(x) for x in wire.encode(live.server.key, "submit", body, {"vertices": v, "faces": f},
                                                    session=session, seq=seq, boot=live.server.boot_id)]
            i = seq % len(frames)
            bit = int(rng.integers(0, 8 * len(frames[i])))
            b = bytearray(frames[i])
            b[bit // 8] ^= 1 << (bit % 8)
            frames[i] = bytes(b)
            reply = raw.ask(frames)
            assert reply is not None
            assert wire.peek_unsigned_error(reply) is not None or \
                wire.decode(live.server.key, reply, wire.REPLIES).body["code"] in ("bad_signature", "bad_message")
        c = SolverClient(live.connection, timeout_s=2, retries=0)
        with pytest.raises(ClientError):
            c.poll(job)  # no job was ever created
        c.close()
    finally:
        raw.close()


def test_replayed_message_is_rejected_and_a_retry_is_answered_from_cache(live):
    c = SolverClient(live.connection, timeout_s=2, retries=0)
    v, f = tetrahedron()
    source = fresh_id("replay")
    for _ in range(2):
        c.wait(c.submit(fresh_id(), "echo", {"delay_s": 0.0}, v, f, source_key=source)["job_id"], timeout_s=30)
    nodes = c.history(source)
    assert c.current(source) == nodes[1]["id"]
    raw = Raw(live.server.endpoint)
    try:
        session = wire.new_id()
        undo = [bytes(x) for x in wire.encode(live.server.key, "undo", {"source_key": source}, session=session, seq=5,
                                              boot=live.server.boot_id)]
        first = wire.decode(live.server.key, raw.ask(undo), wire.REPLIES)
        assert first.body["current"] == nodes[0]["id"]
        # The identical frames again (a client retry after a lost reply): the same answer, no second undo.
        again = wire.decode(live.server.key, raw.ask(undo), wire.REPLIES)
        assert again.body["current"] == nodes[0]["id"] and c.current(source) == nodes[0]["id"]
        # The same seq with other content, or an older seq: a replay.
        older = [bytes(x) for x in wire.encode(live.server.key, "undo", {"source_key": source}, session=session, seq=4,
                                               boot=live.server.boot_id)]
        for frames in (older,):
            reply = wire.decode(live.server.key, raw.ask(frames), wire.REPLIES)
            assert reply.type == "error" and reply.body["code"] == "replay"
        assert c.current(source) == nodes[0]["id"]
        # A message from before a restart names an old boot id: refused.
        stale = [bytes(x) for x in wire.encode(live.server.key, "undo", {"source_key": source}, session=session, seq=9,
                                               boot="0" * 32)]
        reply = wire.decode(live.server.key, raw.ask(stale), wire.REPLIES)
        assert reply.body["code"] == "stale_boot" and c.current(source) == nodes[0]["id"]
    finally:
        raw.close()
        c.close()


def test_message_from_far_outside_the_clock_window_is_refused(live, monkeypatch):
    raw = Raw(live.server.endpoint)
    try:
        monkeypatch.setattr(time, "time", lambda: 1_000_000.0)  # a recorded message from long ago
        frames = [bytes(x) for x in wire.encode(live.server.key, "ping", {}, session=wire.new_id(), seq=1)]
        monkeypatch.undo()
        reply = wire.decode(live.server.key, raw.ask(frames), wire.REPLIES)
        assert reply.body["code"] == "stale_clock"
    finally:
        raw.close()


def test_too_many_frames_are_drained_and_refused(live):
    raw = Raw(live.server.endpoint)
    try:
        reply = raw.ask([b"x"] * (wire.MAX_ARRAYS + 10))
        assert wire.decode(live.server.key, reply, wire.REPLIES).body["code"] == "bad_message"
        assert raw.ask([bytes(x) for x in wire.encode(live.server.key, "ping", {}, session=wire.new_id(), seq=1)])
    finally:
        raw.close()


def _curve_setup(tmp_path):
    keys = tmp_path / "keys"
    allowed = tmp_path / "allowed"
    auth.create_keypair(keys, "server")
    auth.create_keypair(keys, "artist")
    auth.create_keypair(keys, "stranger")
    allowed.mkdir(mode=0o700)
    (allowed / "artist.key").write_bytes((keys / "artist.key").read_bytes())
    os.chmod(allowed / "artist.key", 0o600)
    return keys, allowed


def test_curve_admits_allow_listed_clients_and_refuses_others_before_reading_payload(tmp_path):
    keys, allowed = _curve_setup(tmp_path)
    server = Server(ServerConfig(data_dir=tmp_path / "data", connection_file=tmp_path / "run" / "s.json",
                                 curve_secret=keys / "server.key_secret", allow_keys=allowed, limits=JobLimits()))
    import threading

    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        info = dict(server.connection_info)
        assert info["curve_server_public"] == auth.load_keypair(keys / "server.key")[0]
        pub, sec = auth.load_keypair(keys / "artist.key_secret")
        ok = SolverClient(dict(info, curve_client_public=pub, curve_client_secret=sec), timeout_s=3, retries=0)
        assert ok.ping()["boot_id"] == server.boot_id
        ok.close()
        before = server.stats["received"]
        pub, sec = auth.load_keypair(keys / "stranger.key_secret")
        bad = SolverClient(dict(info, curve_client_public=pub, curve_client_secret=sec), timeout_s=0.5, retries=1)
        with pytest.raises(SolverUnreachable):
            bad.ping()
        bad.close()
        # A plain (non-CURVE) client holding the right HMAC key gets nowhere either.
        plain = SolverClient({"endpoint": info["endpoint"], "key": info["key"]}, timeout_s=0.5, retries=0)
        with pytest.raises(SolverUnreachable):
            plain.ping()
        plain.close()
        assert server.stats["received"] == before  # the handshake failed: no message reached the loop
        assert server._auth.allow_list.rejected >= 1  # refused by the ZAP allow-list (RFC 27)
    finally:
        server.stop()
        thread.join(timeout=10)


def test_listening_beyond_loopback_needs_curve(tmp_path):
    with pytest.raises(InvalidInput) as err:
        Server(ServerConfig(data_dir=tmp_path / "d", endpoint="tcp://0.0.0.0:*", limits=JobLimits()))
    assert "CURVE" in str(err.value)
    for endpoint in ("tcp://192.168.1.5:5555", "tcp://eth0:5555", "tcp://solver.example:5555", "tcp://[::]:5555"):
        with pytest.raises(InvalidInput):
            auth.check_endpoint(endpoint, curve_ready=False)
        assert auth.check_endpoint(endpoint, curve_ready=True) == endpoint
    for endpoint in ("tcp://127.0.0.1:5555", "tcp://[::1]:5555", "tcp://localhost:5555"):
        assert auth.check_endpoint(endpoint, curve_ready=False) == endpoint
    for bad in ("udp://127.0.0.1:1", "tcp://127.0.0.1", "/tmp/socket"):
        with pytest.raises(InvalidInput):
            auth.check_endpoint(bad, curve_ready=False)
    keys, _ = _curve_setup(tmp_path)
    with pytest.raises(InvalidInput):  # CURVE half-configured
        Server(ServerConfig(data_dir=tmp_path / "d2", curve_secret=keys / "server.key_secret", limits=JobLimits()))


def test_connection_and_key_files_are_private(tmp_path):
    srv = ServerThread(tmp_path)
    try:
        path = srv.server.connection_path
        assert stat.S_IMODE(path.stat().st_mode) == 0o600
        assert stat.S_IMODE(path.parent.stat().st_mode) == 0o700
        info = json.loads(path.read_text())
        assert wire.is_hex64(info["key"]) and info["endpoint"].startswith("tcp://127.0.0.1:")
        os.chmod(path, 0o644)
        with pytest.raises(ClientError) as err:
            SolverClient(path)
        assert "chmod 600" in str(err.value)
    finally:
        srv.stop()
    pub, sec = auth.create_keypair(tmp_path / "k", "artist")
    assert stat.S_IMODE(pub.stat().st_mode) == 0o600 and stat.S_IMODE(sec.stat().st_mode) == 0o600
    assert stat.S_IMODE((tmp_path / "k").stat().st_mode) == 0o700
    with pytest.raises(InvalidInput):
        auth.create_keypair(tmp_path / "k", "../escape")


@pytest.mark.parametrize("info, fragment", [
    ({}, "endpoint"),
    ({"endpoint": "http://x", "key": "0" * 64}, "endpoint"),
    ({"endpoint": "tcp://127.0.0.1:1", "key": "short"}, "key"),
    ({"endpoint": "tcp://127.0.0.1:1", "key": "0" * 64, "curve_server_public": "x" * 40}, "CURVE"),
])
def test_client_refuses_bad_connection_info(info, fragment):
    with pytest.raises(ClientError) as err:
        SolverClient(info)
    assert fragment in str(err.value)


def test_client_refuses_missing_or_garbled_connection_file(tmp_path):
    with pytest.raises(ClientError):
        SolverClient(tmp_path / "none.json")
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    os.chmod(bad, 0o600)
    with pytest.raises(ClientError):
        SolverClient(bad)


def test_serve_help_warns_about_networks():
    from isoclay.commands import serve

    parser = argparse.ArgumentParser()
    sub = parser.add_subparsers()
    help_text = serve.add_parser(sub).format_help()
    assert "CAUTION" in help_text and "CURVE" in help_text and "loopback" in help_text
