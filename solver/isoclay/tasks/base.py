"""What every edit task shares: parameter checks and the result record (callbacks live in isoclay.callbacks)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..callbacks import Progress, check_stop, never_stop, no_progress  # noqa: F401 (re-exported for tasks)
from ..mesh.types import TriangleMesh


def is_finite_number(value) -> bool:
    """True for a finite int or float parameter (bools, strings, NaN and infinities are not)."""
    import math

    return not isinstance(value, bool) and isinstance(value, (int, float)) and math.isfinite(value)


def check_param_names(task: str, params, known, example: str) -> None:
    """Refuse parameters that are not a mapping or hold names the task does not know (one line)."""
    from ..errors import InvalidInput

    if not isinstance(params, dict):
        raise InvalidInput(f"{task}: parameters must be a mapping such as {example}")
    unknown = set(params) - set(known)
    if unknown:
        raise InvalidInput(f"{task}: unknown parameter(s) {', '.join(sorted(unknown))}; known: {', '.join(known)}")


@dataclass(frozen=True)
class TaskResult:
    """What an edit returns, in unit-box coordinates (the caller maps back to world units).

    mesh : the result surface; for keep-topology edits the input's faces with moved vertices,
        else a new watertight mesh; per-vertex values (e.g. "stretch", "bend", "moved") ride in
        mesh.vertex_values
    field : the edited field (SDFField) so a later edit can start from it, or None
    metrics : scalar quality figures (handle_error_max, volume_change, ...), unit-box lengths
        unless the name says otherwise
    seconds : wall time per stage
    rest_points : (n, 3) float64 or None: for each result vertex, the point of the input's space it
        came from (a deform's pre-image, found through the edit's own map); None means "the
        closest input surface point" (smooth, sharpen, remesh). Carries UVs and materials over.
    """

    mesh: TriangleMesh
    field: object | None
    metrics: dict[str, float] = field(default_factory=dict)
    seconds: dict[str, float] = field(default_factory=dict)
    rest_points: np.ndarray | None = None


def face_normals(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(m, 3) unit normals of triangles (zero for degenerate ones)."""
    n = np.cross(vertices[faces[:, 1]] - vertices[faces[:, 0]], vertices[faces[:, 2]] - vertices[faces[:, 0]])
    length = np.linalg.norm(n, axis=1, keepdims=True)
    return n / np.maximum(length, 1e-300)
