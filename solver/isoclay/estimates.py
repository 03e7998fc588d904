"""Pre-flight estimates of what an edit will need (memory), before any work: no torch, no sockets.

The service refuses a job that would not fit its memory limit; batch runs refuse an item that would not
fit its worker. One function so both say the same thing.
"""

from __future__ import annotations

import math


#: Fit settings the estimate reads (the field stream's FitConfig defaults; no torch import here).
DEFAULT_FIELD_RESOLUTION = 1024
COARSE_RESOLUTION = 128
#: Bytes per coarse grid node while fitting: distances, sides, faces, winding numbers, labels and the
#: distance transform's indices (~150 MB at 128 cells, measured peak minus the mesh).
COARSE_NODE_BYTES = 64
#: Bytes per fine band node while fitting (block arrays of distances, sides, faces, residuals and two
#: stencil buffers) and fine nodes per squared fine resolution when the whole surface is refined at
#: the full resolution (the worst case: thin parts take the fine grid there): a sphere of radius 0.4
#: at 1024 holds 23M block nodes = 22 R^2; twice that for surfaces of twice its area.
FINE_NODE_BYTES = 48
FINE_NODES_PER_R2 = 44


def estimate_memory(task: str, n_vertices: int, n_faces: int, params: dict) -> int:
    """Rough peak bytes of a worker (pre-flight check; common practice, no source: measured torch import
    ~0.65 GB address space; the sparse field's coarse grid and fine blocks as above; mesh queries ~300
    bytes per element; a remeshed result ~200 bytes per output face)."""
    mesh = 3 * (24 * n_vertices + 24 * n_faces)
    if task == "echo":
        return (200 << 20) + mesh
    fit = params.get("fit") if isinstance(params.get("fit"), dict) else {}
    resolution = _number(fit.get("resolution"), DEFAULT_FIELD_RESOLUTION)
    coarse = min(resolution, COARSE_RESOLUTION)
    field = COARSE_NODE_BYTES * (coarse + 3) ** 3
    if resolution > coarse:
        field += FINE_NODE_BYTES * FINE_NODES_PER_R2 * resolution**2 + 4 * (resolution // 8 + 1) ** 3
    output = _number(params.get("resolution"), 256)
    result = 200 * int(2.4 * output**2)
    return (800 << 20) + field + 300 * (n_vertices + n_faces) + mesh + result


def _number(value, default: int) -> int:
    return int(value) if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value) else default
