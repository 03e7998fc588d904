"""Remesh: the fitted field's surface as a clean, watertight mesh (a broken scan in, a closed mesh out)."""

from __future__ import annotations

import time
from dataclasses import dataclass

from ..bounds import shown
from ..errors import InvalidInput
from ..extract import bounds_of, decimate, extract_mesh
from ..mesh import measures
from ..mesh.types import TriangleMesh
from .base import TaskResult, check_param_names, check_stop

#: A closed surface needs at least a tetrahedron's 4 faces.
MIN_TARGET_FACES = 4
#: The wire carries at most 20,000,000 rows per array (wire.MAX_DIM): a result cannot have more faces.
MAX_TARGET_FACES = 20_000_000


@dataclass(frozen=True)
class Config:
    """resolution : marching-cubes cells along the object's longest side, 16..1024;
    target_faces : decimate to at most this many faces (0 = keep all), else 4..20,000,000."""

    resolution: int = 256
    target_faces: int = 0

    @classmethod
    def from_params(cls, params: dict, normalization=None) -> "Config":
        check_param_names("remesh", params, ("resolution", "target_faces"), '{"resolution": 256}')
        resolution = params.get("resolution", cls.resolution)
        target = params.get("target_faces", cls.target_faces)
        if isinstance(resolution, bool) or not isinstance(resolution, int) or not 16 <= resolution <= 1024:
            raise InvalidInput(f"remesh: resolution {shown(resolution)} out of range: use an integer from 16 to 1024")
        if isinstance(target, bool) or not isinstance(target, int) or target < 0:
            raise InvalidInput(f"remesh: target_faces {shown(target)} must be a whole number >= 0 (0 keeps every face)")
        if target and not MIN_TARGET_FACES <= target <= MAX_TARGET_FACES:
            raise InvalidInput(f"remesh: target_faces {shown(target)} is out of range: use 0 (keep every face) or "
                               f"{shown(MIN_TARGET_FACES)} to {shown(MAX_TARGET_FACES)}")
        return cls(resolution, target)


def run(field, mesh: TriangleMesh, config: Config, progress, should_stop) -> TaskResult:
    """Extract the field's zero level set around the input mesh (unit-box coordinates)."""
    t0 = time.perf_counter()
    lo, hi = bounds_of(mesh.vertices)
    stats: dict = {}
    out = extract_mesh(field, lo, hi, config.resolution, progress, should_stop, stats)
    seconds = {"extract": time.perf_counter() - t0}
    if config.target_faces:
        check_stop(should_stop, "decimate")
        t1 = time.perf_counter()
        out = decimate(out, config.target_faces)
        seconds["decimate"] = time.perf_counter() - t1
    metrics = {
        "evaluated_fraction": stats["evaluations"] / stats["dense_nodes"],
        "volume_change": measures.signed_volume(out.vertices, out.faces) / max(abs(measures.signed_volume(mesh.vertices, mesh.faces)), 1e-300) - 1.0,
    }
    return TaskResult(out, field, metrics, seconds)
