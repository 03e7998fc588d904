"""Remesh: the fitted field's surface as a clean, watertight mesh (a broken scan in, a closed mesh out)."""

from __future__ import annotations

import time
from dataclasses import dataclass

from ..errors import InvalidInput
from ..extract import bounds_of, decimate, extract_mesh
from ..mesh import measures
from ..mesh.types import TriangleMesh
from .base import TaskResult, check_param_names, check_stop


@dataclass(frozen=True)
class Config:
    """resolution : marching-cubes cells along the object's longest side;
    target_faces : decimate to at most this many faces (0 = keep all)."""

    resolution: int = 256
    target_faces: int = 0

    @classmethod
    def from_params(cls, params: dict, normalization=None) -> "Config":
        check_param_names("remesh", params, ("resolution", "target_faces"), '{"resolution": 256}')
        resolution = params.get("resolution", cls.resolution)
        target = params.get("target_faces", cls.target_faces)
        if not isinstance(resolution, int) or not 16 <= resolution <= 1024:
            raise InvalidInput(f"remesh: resolution {resolution!r} out of range: use an integer from 16 to 1024")
        if not isinstance(target, int) or target < 0:
            raise InvalidInput(f"remesh: target_faces {target!r} must be a whole number >= 0")
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
