"""Helpers for the solver service tests: servers on loopback (subprocess or thread), small meshes, ids."""

from __future__ import annotations

import os
import sys
import threading
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
SOLVER = ROOT / "solver"
if str(SOLVER) not in sys.path:
    sys.path.insert(0, str(SOLVER))

from isoclay.bench.service import ServerLauncher, admitted_dealer  # noqa: E402,F401
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


#: `python -m isoclay.service.server` in a subprocess on 127.0.0.1, for restart and kill -9 tests (the
#: benchmark's launcher: one launcher for both).
ServerProcess = ServerLauncher


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


#: Modules named like standard ones: resource is imported by every worker, json by the server itself.
PLANTED = ("resource", "json")


def plant_modules(folder: Path) -> Path:
    """A folder of modules named like standard ones that leave a marker when imported (and break the import)."""
    folder.mkdir()
    for name in PLANTED:
        (folder / f"{name}.py").write_text(f"open({str(folder / (name + '.imported'))!r}, 'w').close()\n"
                                           f"raise ImportError('planted {name}.py was imported')\n")
    return folder


def planted_markers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.glob("*.imported"))


def fresh_id(prefix: str = "job") -> str:
    return f"{prefix}-{os.urandom(6).hex()}"
