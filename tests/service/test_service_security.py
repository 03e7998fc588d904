"""Security: forged, tampered and replayed messages; admission before reading (PLAIN or CURVE with a ZAP allow-list);
only signed replies trusted; history per client key; loopback-only by default (IPv6 too); file modes."""

from __future__ import annotations

import argparse
import errno
import json
import os
import stat
import time

import numpy as np
import pytest
import zmq

from service_support import ServerThread, admitted_dealer, fresh_id, tetrahedron
from isoclay import wire
from isoclay.client import ClientError, KeyRejected, RemoteError, SolverClient, SolverUnreachable
from isoclay.errors import InvalidInput
from isoclay.service import auth
from isoclay.service.jobs import JobLimits
from isoclay.service.server import Server, ServerConfig


class Raw:
    """A bare DEALER for sending hand-made frames (admitted like a client of the connection file)."""

    def __init__(self, server):
        self.ctx = zmq.Context()
        self.s = admitted_dealer(self.ctx, server.endpoint, server.key)

    def ask(self, frames, timeout_ms=3000):
        self.s.send_multipart(frames)
        return self.s.recv_multipart() if self.s.poll(timeout_ms) else None

    def close(self):
        self.s.close()
        self.ctx.term()


def test_a_client_with_a_wrong_key_is_refused_before_any_message_is_read(live):
    info = live.connection
    info["key"] = wire.new_key()
    before, refused = live.server.stats["received"], live.server._auth.rejected
    c = SolverClient(info, timeout_s=0.5, retries=0)
    with pytest.raises(SolverUnreachable) as err:  # nothing trustworthy answered: never a "key rejected" claim
        c.ping()
    assert "connection file" in str(err.value)
    c.close()
    assert live.server.stats["received"] == before  # refused in the handshake (ZAP, PLAIN password)
    assert live.server._auth.rejected > refused


def test_tampered_frames_are_rejected_and_run_nothing(live):
    v, f = wire.canonical_mesh(*tetrahedron())
    job = fresh_id()
    body = {"job_id": job, "task": "echo", "params": {}, "source_key": "tamper", "parent_node": None, "mesh_hash": None}
    raw = Raw(live.server)
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
    raw = Raw(live.server)
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
    raw = Raw(live.server)
    try:
        monkeypatch.setattr(time, "time", lambda: 1_000_000.0)  # a recorded message from long ago
        frames = [bytes(x) for x in wire.encode(live.server.key, "ping", {}, session=wire.new_id(), seq=1)]
        monkeypatch.undo()
        reply = wire.decode(live.server.key, raw.ask(frames), wire.REPLIES)
        assert reply.body["code"] == "stale_clock"
    finally:
        raw.close()


def test_too_many_frames_are_drained_and_refused(live):
    raw = Raw(live.server)
    try:
        signed = [bytes(x) for x in wire.encode(live.server.key, "ping", {}, session=wire.new_id(), seq=1)]
        reply = raw.ask(signed + [b"x"] * (wire.MAX_ARRAYS + 10))
        assert wire.decode(live.server.key, reply, wire.REPLIES).body["code"] == "bad_message"
        # Unsigned frames are dropped as soon as the header fails: the answer is the bare unsigned refusal.
        assert wire.peek_unsigned_error(raw.ask([b"x"] * (wire.MAX_ARRAYS + 10))) is not None
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


class FakeSolver:
    """Something else listening where the client expects its solver: it admits any login and answers every
    request with ``answer(frames)`` (frames without the ROUTER identity)."""

    def __init__(self, answer):
        import threading

        from zmq.auth.thread import ThreadAuthenticator

        class AdmitAll(ThreadAuthenticator):
            def _authenticate_plain(self, domain, username, password):
                return True, b"OK"

        self.ctx = zmq.Context()
        self.auth = AdmitAll(self.ctx)
        self.auth.start()
        self.sock = self.ctx.socket(zmq.ROUTER)
        self.sock.plain_server = True
        self.sock.zap_domain = b"fake"
        self.sock.setsockopt(zmq.LINGER, 0)
        port = self.sock.bind_to_random_port("tcp://127.0.0.1")
        self.endpoint = f"tcp://127.0.0.1:{port}"
        self.answered = 0
        self._stop = threading.Event()
        self._answer = answer
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self):
        while not self._stop.is_set():
            if self.sock.poll(20):
                identity, *frames = self.sock.recv_multipart()
                self.sock.send_multipart([identity, *self._answer(frames)])
                self.answered += 1

    def close(self):
        self._stop.set()
        self.thread.join(timeout=5)
        self.sock.close()
        self.auth.stop()
        self.ctx.term()


def _signed_by_another_key(frames):
    import msgpack

    request = msgpack.unpackb(frames[1], raw=False)
    return wire.encode(wire.key_bytes(wire.new_key()), "error", {"code": "bad_signature", "message": "wrong key"},
                       session=request["session"], seq=1, re=request["seq"])


@pytest.mark.parametrize("answer", [lambda frames: wire.encode_unsigned_error(), _signed_by_another_key],
                         ids=["unsigned", "signed with another key"])
def test_replies_without_our_signature_never_count_as_a_key_rejection(answer, tmp_path):
    fake = FakeSolver(answer)
    path = tmp_path / "solver.json"
    path.write_text(json.dumps({"endpoint": fake.endpoint, "key": wire.new_key()}))
    os.chmod(path, 0o600)
    try:
        c = SolverClient(path, timeout_s=0.3, retries=1)
        with pytest.raises(ClientError) as err:
            c.ping()
        assert type(err.value) is SolverUnreachable and "untrusted" in str(err.value)
        assert fake.answered >= 1  # it did answer: the answers were ignored, not trusted
        # Local evidence is trusted: the connection file now names another key.
        path.write_text(json.dumps({"endpoint": fake.endpoint, "key": wire.new_key()}))
        with pytest.raises(KeyRejected) as err:
            c.ping()
        assert "connect again" in str(err.value)
        c.close()
    finally:
        fake.close()


def _curve_server(tmp_path, keys, allowed, **config):
    import threading

    server = Server(ServerConfig(data_dir=tmp_path / "data", connection_file=tmp_path / "run" / "s.json",
                                 curve_secret=keys / "server.key_secret", allow_keys=allowed,
                                 limits=JobLimits(test_params=True), **config))
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    return server, thread


def _curve_client(server, keys, name, **over):
    pub, sec = auth.load_keypair(keys / f"{name}.key_secret")
    return SolverClient(dict(server.connection_info, curve_client_public=pub, curve_client_secret=sec, **over),
                        timeout_s=3, retries=0)


@pytest.mark.parametrize("shared", [False, True], ids=["per key", "shared"])
def test_with_curve_a_second_key_cannot_touch_the_first_keys_history(tmp_path, shared):
    keys, allowed = _curve_setup(tmp_path)
    auth.create_keypair(keys, "second")
    (allowed / "second.key").write_bytes((keys / "second.key").read_bytes())
    os.chmod(allowed / "second.key", 0o600)
    server, thread = _curve_server(tmp_path, keys, allowed, shared_history=shared)
    a, b = _curve_client(server, keys, "artist"), _curve_client(server, keys, "second")
    try:
        v, f = tetrahedron()
        job = fresh_id()
        a.submit(job, "echo", {"delay_s": 0.0}, v, f, source_key="Jug")
        node = a.wait(job, timeout_s=30)["node_id"]
        if shared:  # --shared-history: one history for every allowed key
            assert [n["id"] for n in b.history("Jug")] == [node]
            assert b.undo("Jug") == "" and a.current("Jug") == ""
            return
        assert b.history("Jug") == [] and b.current("Jug") == ""
        assert b.undo("Jug") == "" and a.current("Jug") == node
        for call in (lambda: b.checkout("Jug", node), lambda: b.fetch_node(node), lambda: b.poll(job),
                     lambda: b.result(job), lambda: b.branch_from(node, fresh_id(), "echo", {"delay_s": 0.0}, "Jug"),
                     lambda: b.submit(job, "echo", {"delay_s": 0.0}, v, f, source_key="Jug")):
            with pytest.raises(RemoteError) as err:
                call()
            assert "Jug" not in str(err.value).replace("'Jug'", "") and a.current("Jug") == node
        assert [n["id"] for n in a.history("Jug")] == [node]
        np.testing.assert_array_equal(a.fetch_node(node).vertices, v)
        # Over CURVE the server has proved who it is, so its "bad signature" is believed: a stale HMAC key.
        stale = _curve_client(server, keys, "artist", key=wire.new_key())
        with pytest.raises(KeyRejected):
            stale.ping()
        stale.close()
    finally:
        a.close()
        b.close()
        server.stop()
        thread.join(timeout=10)


def test_ipv6_loopback_binds_or_is_refused_in_one_line(tmp_path):
    from isoclay.service.server import _bind_refusal

    try:
        srv = Server(ServerConfig(data_dir=tmp_path / "d", endpoint="tcp://[::1]:*", limits=JobLimits()))
    except InvalidInput as exc:  # a machine without IPv6 loopback
        assert "IPv6" in str(exc) and "127.0.0.1" in str(exc) and "\n" not in str(exc)
    else:
        import threading

        thread = threading.Thread(target=srv.serve_forever, daemon=True)
        thread.start()
        try:
            assert srv.endpoint.startswith("tcp://[::1]:")
            c = SolverClient(srv.connection_info, timeout_s=3, retries=0)
            assert c.ping()["boot_id"] == srv.boot_id
            c.close()
        finally:
            srv.stop()
            thread.join(timeout=10)
    text = _bind_refusal("tcp://[::1]:5555", zmq.ZMQError(errno.EADDRNOTAVAIL))
    assert "IPv6" in text and "pick another port" not in text and "\n" not in text
