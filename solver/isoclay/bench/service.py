"""Service benchmark: fuzzing, kill -9 cycles, round-trip overhead against a raw loopback copy, control latency.

``run(quick)`` returns a JSON-ready dict; `isoclay bench` calls it. The helpers (mutation of
valid messages, a server launcher, the kill -9 cycle) are shared with tests/service/.
Everything listens on 127.0.0.1 only and runs in a temporary directory.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import msgpack
import numpy as np

from .. import wire

SOLVER_ROOT = Path(__file__).resolve().parents[2]


# ---------------------------------------------------------------- fuzzing

def valid_messages(key: bytes, rng: np.random.Generator, session: str = "f" * 32) -> list[list[bytes]]:
    """A varied set of well-formed signed requests (every request type, with and without arrays)."""
    v = rng.random((6, 3))
    f = np.array([[0, 1, 2], [2, 3, 4], [3, 4, 5], [0, 2, 5]])
    bodies = {
        "ping": {}, "poll": {"job_id": "fz-1"}, "cancel": {"job_id": "fz-1"}, "resume": {"job_id": "fz-1"},
        "result": {"job_id": "fz-1"}, "fetch_node": {"node_id": "0" * 32}, "history": {"source_key": "fuzz"},
        "undo": {"source_key": "fuzz"}, "redo": {"source_key": "fuzz"},
        "checkout": {"source_key": "fuzz", "node_id": ""},
        "submit": {"job_id": "fz-2", "task": "echo", "params": {}, "source_key": "fuzz", "parent_node": None,
                   "mesh_hash": wire.mesh_hash(v, f)},
    }
    out = []
    for i, (kind, body) in enumerate(bodies.items()):
        arrays = {"vertices": v, "faces": f} if kind == "submit" else None
        out.append([bytes(x) for x in wire.encode(key, kind, body, arrays, session=session, seq=i + 1)])
    return out


def _random_value(rng, depth=0):
    r = rng.integers(0, 9 if depth < 4 else 6)
    if r == 0:
        return None
    if r == 1:
        return bool(rng.integers(0, 2))
    if r == 2:
        return int(rng.integers(-2**63, 2**63 - 1))
    if r == 3:
        return float(rng.choice([np.nan, np.inf, -0.0, 1e308, rng.normal()]))
    if r == 4:
        return "".join(chr(int(c)) for c in rng.integers(0, 0x2FF, rng.integers(0, 40)))
    if r == 5:
        return bytes(rng.integers(0, 256, rng.integers(0, 20), dtype=np.uint8))
    if r == 6:
        return [_random_value(rng, depth + 1) for _ in range(rng.integers(0, 4))]
    if r == 7:
        return {str(_random_value(rng, 9)): _random_value(rng, depth + 1) for _ in range(rng.integers(0, 4))}
    return msgpack.ExtType(int(rng.integers(0, 127)), b"x")


def mutate(frames: list[bytes], rng: np.random.Generator, key: bytes) -> list[bytes]:
    """One malformed or mutated variant of a valid message; half are re-signed so they reach the parser."""
    frames = list(frames)
    op = int(rng.integers(0, 10))
    i = int(rng.integers(0, len(frames)))
    if op == 0:  # flip bits
        b = bytearray(frames[i])
        for _ in range(int(rng.integers(1, 4))):
            if b:
                b[int(rng.integers(0, len(b)))] ^= 1 << int(rng.integers(0, 8))
        frames[i] = bytes(b)
    elif op == 1:  # truncate
        frames[i] = frames[i][: int(rng.integers(0, max(1, len(frames[i]))))]
    elif op == 2:  # insert garbage
        b = frames[i]
        at = int(rng.integers(0, len(b) + 1))
        frames[i] = b[:at] + bytes(rng.integers(0, 256, int(rng.integers(1, 16)), dtype=np.uint8)) + b[at:]
    elif op == 3:  # drop or duplicate frames
        if rng.random() < 0.5 and len(frames) > 1:
            del frames[i]
        else:
            frames.insert(i, frames[i])
    elif op == 4:  # random frames altogether
        frames = [bytes(rng.integers(0, 256, int(rng.integers(0, 64)), dtype=np.uint8))
                  for _ in range(int(rng.integers(0, 5)))]
    else:  # replace a header field or the whole header by random msgpack values
        try:
            header = msgpack.unpackb(frames[1], raw=False)
        except Exception:
            header = {}
        if op == 5 and isinstance(header, dict) and header:
            field = list(header)[int(rng.integers(0, len(header)))]
            header[field] = _random_value(rng)
        elif op == 6 and isinstance(header, dict) and isinstance(header.get("body"), dict) and header["body"]:
            field = list(header["body"])[int(rng.integers(0, len(header["body"])))]
            header["body"][field] = _random_value(rng)
        elif op == 7 and isinstance(header, dict):
            header["arrays"] = [[_random_value(rng), rng.choice(["<f8", "<i8", "|O", "<f2", 7]),
                                 [int(x) for x in rng.integers(-2, 2**31, int(rng.integers(0, 4)))]]]
        else:
            header = _random_value(rng)
        try:
            frames[1:2] = [msgpack.packb(header, use_bin_type=True)]
        except Exception:
            frames[1:2] = [b"\xc1"]
        if rng.random() < 0.5 and len(frames) >= 2:  # re-sign: the mutation must be caught by the parser
            frames[0] = wire.sign(key, frames[1])
    return frames


def fuzz_decode(count: int, seed: int = 0) -> dict:
    """Mutated messages straight into wire.decode: every outcome must be a WireError or a valid message."""
    rng = np.random.default_rng(seed)
    key = os.urandom(32)
    base = valid_messages(key, rng)
    counts = {"messages": 0, "rejected": 0, "accepted": 0, "crashes": 0}
    for _ in range(count):
        frames = mutate(base[int(rng.integers(0, len(base)))], rng, key)
        counts["messages"] += 1
        try:
            wire.decode(key, frames, wire.REQUESTS)
            counts["accepted"] += 1
        except wire.WireError:
            counts["rejected"] += 1
        except Exception:  # anything else is a decoder crash
            counts["crashes"] += 1
    # The harness must not pass by rejecting everything: a known-good message still decodes.
    counts["known_good_after"] = wire.decode(key, base[0], wire.REQUESTS).type == "ping"
    return counts


def fuzz_server(count: int, seed: int = 1, workdir: Path | None = None) -> dict:
    """Mutated messages to a live server (in a thread) over loopback; it must answer on and never crash or hang."""
    import zmq

    from ..client import SolverClient
    from ..service.jobs import JobLimits
    from ..service.server import Server, ServerConfig

    with tempfile.TemporaryDirectory(dir=workdir) as tmp:
        server = Server(ServerConfig(data_dir=Path(tmp) / "data", connection_file=Path(tmp) / "run" / "s.json",
                                     limits=JobLimits()))
        thread = threading.Thread(target=server.serve_forever, daemon=True)
        thread.start()
        ctx = zmq.Context()
        sock = admitted_dealer(ctx, server.endpoint, server.key)
        rng = np.random.default_rng(seed)
        key = server.key
        base = valid_messages(key, rng, session=wire.new_id())
        t0 = time.perf_counter()
        hangs = 0
        window = 200
        for start in range(0, count, window):
            n = min(window, count - start)
            for _ in range(n):
                frames = mutate(base[int(rng.integers(0, len(base)))], rng, key)
                sock.send_multipart(frames if frames else [b""])
            # Every message gets exactly one reply; a missing one within 10 s is a hang.
            got = 0
            deadline = time.monotonic() + 10.0
            while got < n and time.monotonic() < deadline:
                if sock.poll(100):
                    sock.recv_multipart()
                    got += 1
            hangs += n - got
        seconds = time.perf_counter() - t0
        client = SolverClient(server.connection_info, timeout_s=5.0, retries=1)
        known_good = client.ping()["boot_id"] == server.boot_id
        client.close()
        alive = thread.is_alive()
        stats = dict(server.stats)
        server.stop()
        thread.join(timeout=10)
        sock.close()
        ctx.term()
    return {"messages": count, "hangs": hangs, "server_alive": alive, "internal_errors": stats["internal_errors"],
            "rejected": stats["rejected"], "known_good_after": known_good, "messages_per_s": count / seconds}


# ---------------------------------------------------------------- server launcher and kill -9 cycles

class ServerLauncher:
    """`python -m isoclay.service.server` as a subprocess on 127.0.0.1 (test parameters on).

    root : folder for the connection file (root/run), data (root/data) and the server's standard
    error (root/server.log); cwd : the folder it starts in (default: this process's);
    safe_path : start with -P as launchers should (False: plain `python -m`, which the server corrects itself)
    """

    def __init__(self, root: Path, extra=(), cwd: Path | None = None, safe_path: bool = True):
        self.root = Path(root)
        self.connection = self.root / "run" / "solver.json"
        self.data = self.root / "data"
        self.log = self.root / "server.log"
        self.extra = list(extra)
        self.cwd = cwd
        self.safe_path = safe_path
        self.proc = None

    def start(self, timeout: float = 30.0) -> dict:
        env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in (str(SOLVER_ROOT), os.environ.get("PYTHONPATH"))
                                                          if p))
        self.root.mkdir(parents=True, exist_ok=True)
        with open(self.log, "ab") as log:
            python = [sys.executable, "-P"] if self.safe_path else [sys.executable]
            self.proc = subprocess.Popen([*python, "-m", "isoclay.service.server", "--data-dir", str(self.data),
                                          "--connection-file", str(self.connection), "--test-params",
                                          "--memory-limit", "2", *self.extra], env=env, cwd=self.cwd,
                                         stdout=subprocess.DEVNULL, stderr=log)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            try:
                info = json.loads(self.connection.read_text())
                if info.get("pid") == self.proc.pid:
                    return info
            except (OSError, ValueError):
                pass
            if self.proc.poll() is not None:
                tail = self.log.read_text(errors="replace").strip().splitlines()[-1:] if self.log.exists() else []
                raise RuntimeError(f"solver exited with code {self.proc.returncode} during start-up: {tail}")
            time.sleep(0.02)
        raise RuntimeError("solver did not write its connection file in time")

    def kill9(self) -> None:
        if self.proc and self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGKILL)
            self.proc.wait()

    def stop(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()


def admitted_dealer(ctx, endpoint: str, key: bytes):
    """A bare DEALER that logs in like a client of the connection file (for hand-made frames)."""
    import zmq

    sock = ctx.socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    sock.plain_username = wire.ADMISSION_USER.encode()
    sock.plain_password = wire.admission_password(key).encode()
    sock.connect(endpoint)
    return sock


# ---------------------------------------------------------------- memory held for unauthenticated peers

def resident(pid: int) -> tuple[int, int]:
    """(current, peak) resident bytes of a process (VmRSS, VmHWM from /proc, Linux)."""
    fields = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        name, _, value = line.partition(":")
        if name in ("VmRSS", "VmHWM"):
            fields[name] = int(value.split()[0]) * 1024
    return fields["VmRSS"], fields["VmHWM"]


def reset_peak(pid: int) -> bool:
    """Reset a process's VmHWM to its current RSS (Linux 4.0+: write 5 to clear_refs); False if refused."""
    try:
        Path(f"/proc/{pid}/clear_refs").write_text("5")
        return True
    except OSError:
        return False


def send_big_message(endpoint: str, gib: float, key: bytes | None = None, frame_mib: int = 128,
                     wait_s: float = 10.0) -> dict:
    """One multipart message of ``gib`` GiB in frames of frame_mib MiB (one zero buffer, sent without copies).

    key None : a plain ZeroMQ peer that never read the connection file; else a peer admitted with
    the key's password whose frames are signed with another key (a stale connection file).
    Returns whether any reply came within wait_s.
    """
    import zmq

    frame = np.zeros(frame_mib << 20, np.uint8)
    count = max(2, int(round(gib * 1024 / frame_mib)))
    ctx = zmq.Context()
    if key is None:
        sock = ctx.socket(zmq.DEALER)
        sock.setsockopt(zmq.LINGER, 0)
        sock.connect(endpoint)
        frames = [frame] * count
    else:
        sock = admitted_dealer(ctx, endpoint, key)
        forged = wire.encode(os.urandom(32), "ping", {}, session=wire.new_id(), seq=1)
        frames = [*forged, *([frame] * (count - 2))]
    try:
        sent = True
        try:
            sock.send_multipart(frames, copy=False, flags=zmq.NOBLOCK)
        except zmq.Again:
            sent = False
        replied = bool(sock.poll(int(wait_s * 1000)))
    finally:
        sock.close(linger=0)
        ctx.term()
    return {"frames": count, "queued": sent, "replied": replied}


def message_memory(gib: float = 3.0, admitted: bool = False, workdir: Path | None = None, wait_s: float = 10.0) -> dict:
    """Resident memory of a solver process around one huge message from a peer without the key.

    admitted False : the peer never read the connection file (refused in the handshake);
    True : it holds the admission password but signs with another key (ZeroMQ still hands over
    only whole messages, so the peak shows one message; afterwards nothing may stay referenced).
    """
    from ..client import SolverClient

    with tempfile.TemporaryDirectory(dir=workdir) as tmp:
        launcher = ServerLauncher(Path(tmp))
        info = launcher.start()
        pid = launcher.proc.pid
        try:
            client = SolverClient(info, timeout_s=5.0, retries=1)
            client.ping()
            before, _ = resident(pid)
            peak_reset = reset_peak(pid)
            outcome = send_big_message(info["endpoint"], gib, wire.key_bytes(info["key"]) if admitted else None,
                                       wait_s=wait_s)
            time.sleep(0.5)
            after, peak = resident(pid)
            answers = client.ping()["boot_id"] == info["boot_id"]
            client.close()
        finally:
            launcher.stop()
    return {"message_gib": gib, "admitted_peer": admitted, **outcome, "rss_before_mib": before / 2**20,
            "peak_rise_mib": (peak - before) / 2**20 if peak_reset else None,
            "rise_after_mib": (after - before) / 2**20, "server_answers_after": answers}


def check_store(data_dir: Path) -> dict:
    """Open the history after a crash (server down): integrity, duplicate nodes, corrupt blobs."""
    from ..history.blobs import BlobStore
    from ..history.store import HistoryStore

    store = HistoryStore(Path(data_dir) / "history.sqlite3")
    blobs = BlobStore(Path(data_dir) / "blobs")
    try:
        integrity = store.integrity_check()
        dup = store.db.execute("SELECT COUNT(*) - COUNT(DISTINCT job_id) FROM nodes").fetchone()[0]
        nodes = {r[0]: r[1] for r in store.db.execute("SELECT job_id, node_id FROM nodes")}
        corrupt = sum(not blobs.verify(b) for b in store.referenced_blobs())
    finally:
        store.close()
    return {"integrity": integrity, "duplicate_nodes": int(dup), "nodes": nodes, "corrupt_blobs": int(corrupt)}


def kill9_cycles(cycles: int, seed: int = 2, workdir: Path | None = None, jobs_per_cycle: int = 2) -> dict:
    """Kill the solver with SIGKILL at random moments while jobs run; check nothing acknowledged is lost.

    Each cycle: start the solver (same data dir and connection file), resubmit a few interrupted
    jobs with their original ids (idempotent), keep submitting new echo jobs that run in worker
    processes and make history nodes, poll them, and SIGKILL the server after a random delay, so
    the kill lands during uploads, job starts, worker runs, commits or replies. Between cycles
    the database is checked with the server down.
    """
    from ..client import ClientError, RemoteError, SolverClient

    rng = np.random.default_rng(seed)
    v = rng.random((50, 3))
    f = np.array([[i, (i + 1) % 50, (i + 7) % 50] for i in range(50)])
    acked: dict[str, str] = {}  # job id -> node id the client saw as done
    submitted: dict[str, dict] = {}
    out = {"cycles": 0, "lost_acknowledged": 0, "duplicate_nodes": 0, "integrity_failures": 0, "corrupt_blobs": 0,
           "acknowledged": 0, "resumed": 0, "kills_with_jobs_in_flight": 0, "refused": 0}
    with tempfile.TemporaryDirectory(dir=workdir) as tmp:
        launcher = ServerLauncher(Path(tmp), extra=["--workers", "2"])
        for cycle in range(cycles):
            info = launcher.start()
            client = SolverClient(info, timeout_s=2.0, retries=0)
            killer = threading.Timer(float(rng.uniform(0.05, 2.5)), launcher.kill9)
            pending = [j for j in submitted if j not in acked][:jobs_per_cycle]  # resume a few interrupted
            serial = 0

            def new_job():
                nonlocal serial
                job_id = f"k{cycle}-{serial}"
                serial += 1
                submitted[job_id] = {"delay_s": float(rng.uniform(0.0, 0.3)) if rng.random() < 0.6 else 0.0}
                return job_id

            try:
                client.ping()
                killer.start()
                pending += [new_job() for _ in range(jobs_per_cycle)]
                for job_id in pending:
                    try:
                        state = client.submit(job_id, "echo", submitted[job_id], v, f, source_key="kill9")
                    except RemoteError:  # e.g. busy: the job stays pending for a later cycle
                        out["refused"] += 1
                        continue
                    if state["state"] == "done":
                        acked[job_id] = state["node_id"]
                deadline = time.monotonic() + 4.0
                while time.monotonic() < deadline and launcher.proc.poll() is None:
                    open_jobs = [j for j in pending if j not in acked]
                    if len(open_jobs) < jobs_per_cycle:  # keep work in flight until the kill lands
                        job_id = new_job()
                        pending.append(job_id)
                        client.submit(job_id, "echo", submitted[job_id], v, f, source_key="kill9")
                    for job_id in open_jobs:
                        state = client.poll(job_id)
                        if state["state"] == "done" and not state["stale"]:
                            acked[job_id] = state["node_id"]
                    time.sleep(0.02)
            except ClientError:
                pass  # the kill landed mid-request: exactly what is being tested
            finally:
                killer.cancel()
                launcher.kill9()
                client.close()
            out["kills_with_jobs_in_flight"] += any(j not in acked for j in pending)
            report = check_store(launcher.data)
            out["cycles"] += 1
            out["integrity_failures"] += report["integrity"] != "ok"
            out["duplicate_nodes"] += report["duplicate_nodes"]
            out["corrupt_blobs"] += report["corrupt_blobs"]
            out["lost_acknowledged"] += sum(report["nodes"].get(j) != n for j, n in acked.items())
        # A last start: every job ever submitted finishes when resubmitted (interrupted ones resume).
        info = launcher.start()
        client = SolverClient(info, timeout_s=5.0, retries=1)
        try:
            for job_id, params in submitted.items():
                state = client.submit(job_id, "echo", params, v, f, source_key="kill9")
                if state["state"] != "done":
                    out["resumed"] += 1
                    state = client.wait(job_id, timeout_s=30)
                if state["state"] != "done":
                    out.setdefault("unfinished", []).append(job_id)
            history = client.history("kill9")
        finally:
            client.close()
            launcher.stop()
        final = check_store(launcher.data)
    out["acknowledged"] = len(acked)
    out["submitted"] = len(submitted)
    out["history_nodes"] = len(history)
    out["duplicate_nodes"] += final["duplicate_nodes"]
    out["lost_acknowledged"] += sum(final["nodes"].get(j) != n for j, n in acked.items())
    return out


# ---------------------------------------------------------------- round trip and latency

def grid_mesh(n_vertices: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """A wavy height-field sheet with about n_vertices vertices (two triangles per grid cell)."""
    side = int(np.ceil(np.sqrt(n_vertices)))
    x, y = np.meshgrid(np.linspace(0, 1, side), np.linspace(0, 1, side), indexing="ij")
    z = 0.05 * np.sin(6 * x) * np.cos(5 * y) + 1e-3 * np.random.default_rng(seed).random(x.shape)
    v = np.stack([x, y, z], -1).reshape(-1, 3)
    idx = np.arange(side * side).reshape(side, side)
    a, b, c, d = idx[:-1, :-1].ravel(), idx[1:, :-1].ravel(), idx[1:, 1:].ravel(), idx[:-1, 1:].ravel()
    f = np.concatenate([np.stack([a, b, c], 1), np.stack([a, c, d], 1)])
    return v, f


_RAW_ECHO = """
import sys, zmq
ctx = zmq.Context()
router = ctx.socket(zmq.ROUTER)
port = router.bind_to_random_port("tcp://127.0.0.1")
print(port, flush=True)
while True:
    frames = router.recv_multipart(copy=False)
    if len(frames) == 2:
        break
    router.send_multipart(frames, copy=False)
"""


class RawEcho:
    """A bare ZeroMQ ROUTER echo in another process: the baseline copy of the same bytes over loopback."""

    def __init__(self):
        import zmq

        self.proc = subprocess.Popen([sys.executable, "-c", _RAW_ECHO], stdout=subprocess.PIPE, text=True)
        port = int(self.proc.stdout.readline())
        self.ctx = zmq.Context()
        self.dealer = self.ctx.socket(zmq.DEALER)
        self.dealer.setsockopt(zmq.LINGER, 0)
        self.dealer.connect(f"tcp://127.0.0.1:{port}")

    def roundtrip(self, v: np.ndarray, f: np.ndarray) -> float:
        t0 = time.perf_counter()
        self.dealer.send_multipart([b"", memoryview(v).cast("B"), memoryview(f).cast("B")], copy=False)
        back = self.dealer.recv_multipart(copy=False)
        np.frombuffer(back[1], np.float64)
        return time.perf_counter() - t0

    def close(self) -> None:
        self.dealer.send_multipart([b"stop"])
        self.dealer.close()
        self.ctx.term()
        try:
            self.proc.wait(timeout=5)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()


def roundtrip_overhead(n_vertices: int = 200_000, repeats: int = 7, workdir: Path | None = None) -> dict:
    """Upload + no-op (echo) job + result download through a solver process, against a raw loopback copy.

    Both run client -> another process -> client over 127.0.0.1; medians of ``repeats`` runs
    after one warm-up, interleaved so machine load affects both alike.
    """
    from ..client import SolverClient

    v, f = wire.canonical_mesh(*grid_mesh(n_vertices))  # the bytes the wire carries: <f8 vertices, <i4 faces
    with tempfile.TemporaryDirectory(dir=workdir) as tmp:
        launcher = ServerLauncher(Path(tmp))
        info = launcher.start()
        client = SolverClient(info, timeout_s=30.0, retries=0)
        client.ping()
        echo = RawEcho()
        times, raw, identical = [], [], True
        try:
            for i in range(repeats + 1):
                vi = v.copy()
                vi[0, 2] += 1e-9 * (i + 1)  # a new mesh each time: a real upload, not a cache hit
                t0 = time.perf_counter()
                state = client.submit(f"rt-{i}", "echo", {}, vi, f, source_key="roundtrip")
                rec = client.result(f"rt-{i}")
                dt = time.perf_counter() - t0
                identical &= state["state"] == "done" and np.array_equal(rec.vertices, vi) and np.array_equal(rec.faces, f)
                raw_dt = echo.roundtrip(vi, f)
                if i:
                    times.append(dt)
                    raw.append(raw_dt)
        finally:
            echo.close()
            client.close()
            launcher.stop()
    service_ms, raw_ms = 1e3 * float(np.median(times)), 1e3 * float(np.median(raw))
    return {"vertices": int(len(v)), "faces": int(len(f)), "megabytes": (v.nbytes + f.nbytes) / 2**20,
            "repeats": repeats, "service_ms_median": service_ms, "raw_copy_ms_median": raw_ms,
            "overhead_ms": service_ms - raw_ms, "target_overhead_ms": 50.0, "result_identical": bool(identical)}


def control_latency(samples: int = 300, task: str = "remesh", workdir: Path | None = None) -> dict:
    """Ping, poll and cancel round trips while a job trains in a worker; p50/p99 in milliseconds."""
    from ..client import SolverClient
    from ..service.jobs import JobLimits
    from ..service.server import Server, ServerConfig
    from ..service.jobs import known_tasks

    with tempfile.TemporaryDirectory(dir=workdir) as tmp:
        server = Server(ServerConfig(data_dir=Path(tmp) / "data", connection_file=Path(tmp) / "run" / "s.json",
                                     limits=JobLimits(test_params=True, threads=1)))
        thread = threading.Thread(target=server.serve_forever, daemon=True)
        thread.start()
        client = SolverClient(server.connection_info, timeout_s=5.0, retries=0, poll_timeout_s=1.0)
        client.ping()
        v, f = grid_mesh(2000)
        v = np.concatenate([v, v + [0, 0, 0.2]])  # a closed-ish pair of sheets is enough for a fit to run
        f = np.concatenate([f, f[:, ::-1] + len(v) // 2])
        if task in known_tasks() and task != "echo":
            params = {"fit": {"resolution": 48, "steps": 100000}}
        else:
            task, params = "echo", {"delay_s": 600.0, "steps": 10000}
        client.submit("lat-job", task, params, v, f, source_key="latency")
        kinds = {"ping": [], "poll": [], "cancel": []}
        t_end = time.monotonic() + 120
        busy = ("refine",) if task != "echo" else ("echo",)
        while client.poll("lat-job")["stage"] not in busy and time.monotonic() < t_end:
            time.sleep(0.05)  # wait until the worker trains (Adam refinement of the field)
        stage = client.poll("lat-job")["stage"]
        for i in range(samples):
            t0 = time.perf_counter()
            client.ping()
            kinds["ping"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            client.poll("lat-job")
            kinds["poll"].append(time.perf_counter() - t0)
            time.sleep(0.005)
        t0 = time.perf_counter()
        client.cancel("lat-job")
        kinds["cancel"].append(time.perf_counter() - t0)
        c0 = time.monotonic()
        final = client.wait("lat-job", timeout_s=10, interval_s=0.02)
        cancel_s = time.monotonic() - c0
        client.close()
        server.stop()
        thread.join(timeout=10)
    all_ms = 1e3 * np.array(kinds["ping"] + kinds["poll"] + kinds["cancel"])
    return {"task": task, "stage_during": stage, "samples": int(all_ms.size),
            "p50_ms": float(np.percentile(all_ms, 50)), "p99_ms": float(np.percentile(all_ms, 99)),
            "max_ms": float(all_ms.max()), "target_p99_ms": 100.0, "cancel_to_final_s": cancel_s,
            "final_state": final["state"]}


def run(quick: bool) -> dict:
    """All service figures (quick: smaller counts)."""
    out = {}
    t0 = time.perf_counter()
    out["fuzz_decode"] = fuzz_decode(20_000 if quick else 100_000)
    out["fuzz_server"] = fuzz_server(5_000 if quick else 100_000)
    out["kill9"] = kill9_cycles(20 if quick else 200)
    # A peer without the connection file: refused in the handshake, so the message never lands.
    out["unauthenticated_message"] = message_memory(1.0 if quick else 3.0)
    # A peer with the admission password but another signing key: one message is held while read, then freed.
    out["wrongly_signed_message"] = message_memory(1.0, admitted=True)
    out["roundtrip"] = roundtrip_overhead(200_000, repeats=5 if quick else 15)
    out["control_latency"] = control_latency(100 if quick else 400)
    out["seconds"] = time.perf_counter() - t0
    return out


if __name__ == "__main__":
    print(json.dumps(run("--quick" in sys.argv), indent=1, default=str))
