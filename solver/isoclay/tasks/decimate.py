"""Decimate: bring a mesh to a face budget with quadric-error edge collapses (extract.decimate, libigl).

The field is not read and, when none is given, not fitted (NEEDS_FIELD): the mesh is reduced as it
is and a given field passes through unchanged (the fewer faces approximate the same surface), so a
step after this one may still start from it.
Usually the last step of a clean-up chain: remesh, smooth, then decimate to the budget.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

from ..errors import InvalidInput
from ..extract import decimate
from ..mesh import measures
from ..mesh.types import TriangleMesh
from .base import TaskResult, check_param_names, check_stop

#: The mesh is reduced as it is: no field is fitted for this task (pipeline.run_edit reads this).
NEEDS_FIELD = False
#: Fewest faces accepted: a closed surface needs at least a tetrahedron's four.
MIN_FACES = 4
#: Most faces accepted as a budget (the validator's limit on any mesh, mesh.validate.MAX_ELEMENTS).
MAX_FACES = 20_000_000


@dataclass(frozen=True)
class Config:
    """target_faces : at most this many faces in the result, 4 to 20,000,000 (a mesh already
    within the budget comes back as it is)."""

    target_faces: int

    KNOWN = ("target_faces",)

    @classmethod
    def from_params(cls, params: dict, normalization=None) -> "Config":
        """params: target_faces (whole number of faces; no units)."""
        check_param_names("decimate", params, cls.KNOWN, '{"target_faces": 50000}')
        if "target_faces" not in params:
            raise InvalidInput("decimate: target_faces is missing: give the face budget, e.g. 50000")
        target = params["target_faces"]
        if isinstance(target, bool) or not isinstance(target, int) or not MIN_FACES <= target <= MAX_FACES:
            raise InvalidInput(f"decimate: target_faces {target!r} out of range: use a whole number from {MIN_FACES} to {MAX_FACES:,}")
        return cls(target)


def run(field, mesh: TriangleMesh, config: Config, progress, should_stop) -> TaskResult:
    """Reduce ``mesh`` (unit box) to at most config.target_faces faces; the field is passed on as it is."""
    t0 = time.perf_counter()
    check_stop(should_stop, "decimate")
    progress("decimate", 0.0, {"faces": mesh.n_faces})
    out = decimate(mesh, config.target_faces)
    progress("decimate", 1.0, {"faces": out.n_faces})
    before = measures.signed_volume(mesh.vertices, mesh.faces)
    metrics = {
        "faces_before": float(mesh.n_faces),
        "volume_change": measures.signed_volume(out.vertices, out.faces) / max(abs(before), 1e-300) - 1.0,
    }
    return TaskResult(out, field, metrics, {"decimate": time.perf_counter() - t0})
