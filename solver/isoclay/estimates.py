"""Pre-flight estimates of what an edit will need (memory), before any work: no torch, no sockets.

The service refuses a job that would not fit its memory limit; batch runs refuse an item that would not
fit its worker. One function so both say the same thing.
"""

from __future__ import annotations

import math


def estimate_memory(task: str, n_vertices: int, n_faces: int, params: dict) -> int:
    """Rough peak bytes of a worker (pre-flight check; common practice, no source: measured torch import ~0.65 GB
    address space, spline grid and optimiser state ~40 floats per node, mesh queries ~300 bytes per element)."""
    mesh = 3 * (24 * n_vertices + 24 * n_faces)
    if task == "echo":
        return (200 << 20) + mesh
    fit = params.get("fit") if isinstance(params.get("fit"), dict) else {}
    resolution = fit.get("resolution", 128)
    resolution = int(resolution) if isinstance(resolution, (int, float)) and math.isfinite(resolution) else 128
    return (800 << 20) + 40 * 4 * (resolution + 4) ** 3 + 300 * (n_vertices + n_faces) + mesh
