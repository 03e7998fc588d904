"""Helpers for the solver service tests: servers on loopback (subprocess or thread), small meshes, ids."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
SOLVER = ROOT / "solver"
if str(SOLVER) not in sys.path:
    sys.path.insert(0, str(SOLVER))

from isoclay.service.jobs import JobLimits  # noqa: E402
from isoclay.service.server import Server, ServerConfig  # noqa: E402


def tetrahedron():
    """A closed, outward-facing tetrahedron (4 vertices, 4 faces)."""
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], dtype=np.float64)
    f = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]], dtype=np.int64)
    return v, f


def icosphere(subdivisions: int = 2):
    """trimesh.creation.icosphere (reference library) as (vertices, faces)."""
    import trimesh

    m = trimesh.creation.icosphere(subdivisions=subdivisions, radius=1.0)
    return np.asarray(m.vertices, np.float64), np.asarray(m.faces, np.int64)


class ServerProcess:
    """`python -m isoclay.service.server` in a subprocess on 127.0.0.1, for restart and kill -9 tests."""

    def __init__(self, tmp: Path, extra=()):
        self.tmp = Path(tmp)
        self.connection = self.tmp / "run" / "solver.json"
        self.data = self.tmp / "data"
        self.extra = list(extra)
        self.proc = None

    def start(self, timeout: float = 20.0) -> dict:
        old = self.connection.read_text() if self.connection.exists() else None
        env = dict(os.environ, PYTHONPATH=str(SOLVER))
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "isoclay.service.server", "--data-dir", str(self.data), "--connection-file",
             str(self.connection), "--test-params", "--memory-limit", "2", *self.extra],
            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.connection.exists():
                text = self.connection.read_text()
                if text != old and text.strip():
                    info = json.loads(text)
                    if info["pid"] == self.proc.pid:
                        return info
            if self.proc.poll() is not None:
                raise RuntimeError(f"server exited: {self.proc.stderr.read().decode()[-500:]}")
            time.sleep(0.02)
        raise RuntimeError("server did not write its connection file in time")

    def kill9(self) -> None:
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
        if self.proc and self.proc.stderr:
            self.proc.stderr.close()


class ServerThread:
    """A Server in a thread of the test process, so tests can read its counters."""

    def __init__(self, tmp: Path, **limits):
        limits.setdefault("test_params", True)
        limits.setdefault("memory_bytes", 2 << 30)
        self.server = Server(ServerConfig(data_dir=Path(tmp) / "data", connection_file=Path(tmp) / "run" / "s.json",
                                          limits=JobLimits(**limits)))
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()

    @property
    def connection(self) -> dict:
        return dict(self.server.connection_info)

    def stop(self) -> None:
        self.server.stop()
        self.thread.join(timeout=10)


def fresh_id(prefix: str = "job") -> str:
    return f"{prefix}-{os.urandom(6).hex()}"
