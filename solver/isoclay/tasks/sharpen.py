"""Sharpen: crisp the rounded creases of a soft form by moving the field toward the crease its
flat sides make (energies.crease_sharpen: bounded, no backward flow)."""

from __future__ import annotations

import time
from dataclasses import dataclass

from ..energies.crease_sharpen import sharpen_grid
from ..energies.curvature_flow import enclosed_volume, node_grid_of, spline_of
from ..errors import InvalidInput
from ..mesh.types import TriangleMesh
from .base import TaskResult, check_param_names, check_stop, is_finite_number
from .smooth import _require_bool, _require_int, surface_of

#: Default sharpening radius (object's longest side = 1): roundings up to about 1/20 of the
#: object are treated as softened creases.
DEFAULT_RADIUS = 0.05
MAX_RADIUS = 0.2


@dataclass(frozen=True)
class Config:
    """amount : 0..1, fraction of the way from the rounded to the sharp crease
    radius : unit-box length; roundings tighter than this are sharpened
    keep_topology, resolution : output as for smooth
    """

    amount: float
    radius: float = DEFAULT_RADIUS
    keep_topology: bool = False
    resolution: int = 256

    KNOWN = ("amount", "radius", "keep_topology", "resolution")

    @classmethod
    def from_params(cls, params: dict, normalization=None) -> "Config":
        """params in the mesh's own units: amount (0..1), radius (length, optional), keep_topology, resolution."""
        check_param_names("sharpen", params, cls.KNOWN, '{"amount": 0.5}')
        if "amount" not in params:
            raise InvalidInput("sharpen: amount is missing: give a value from 0 to 1 (1 = fully sharp creases)")
        a = params["amount"]
        if not is_finite_number(a) or not 0 < a <= 1:
            raise InvalidInput(f"sharpen: amount {a!r} out of range: use a value above 0 and at most 1 (1 = fully sharp creases)")
        to_unit = normalization.length_to_unit if normalization is not None else float
        radius = DEFAULT_RADIUS
        if "radius" in params:
            r = params["radius"]
            if not is_finite_number(r) or r <= 0:
                raise InvalidInput(f"sharpen: radius {r!r} must be a positive length in the mesh's units (the rounding to undo)")
            radius = to_unit(r)
            if radius > MAX_RADIUS:
                size = normalization.length_from_unit(1.0) if normalization is not None else 1.0
                raise InvalidInput(
                    f"sharpen: radius {r:g} is too large for an object {size:.4g} long (limit {MAX_RADIUS * size:.4g}): "
                    "give the size of the roundings to sharpen"
                )
        return cls(
            amount=float(a),
            radius=float(radius),
            keep_topology=_require_bool("sharpen", "keep_topology", params.get("keep_topology", False)),
            resolution=_require_int("sharpen", "resolution", params.get("resolution", cls.resolution), 16, 1024),
        )


def run(field, mesh: TriangleMesh, config: Config, progress, should_stop) -> TaskResult:
    """Sharpen the field's roundings; return the new field and its surface (unit box)."""
    t0 = time.perf_counter()
    progress("sharpen", 0.0, {})
    grid = node_grid_of(field)
    volume_before = enclosed_volume(grid)
    check_stop(should_stop, "sharpen")
    report = sharpen_grid(grid, config.amount, max(config.radius, 2.0 * grid.cell), should_stop)
    new_field = spline_of(grid)
    progress("sharpen", 1.0, {"changed": report.changed})
    seconds = {"sharpen": time.perf_counter() - t0}
    out, more = surface_of(new_field, mesh, config.keep_topology, config.resolution, progress, should_stop, seconds, "sharpen")
    metrics = {
        "field_volume_change": enclosed_volume(grid) / max(volume_before, 1e-300) - 1.0,
        "curved_nodes": float(report.curved),
        "changed_nodes": float(report.changed),
        "field_change_max_length": report.max_change,
        **more,
    }
    return TaskResult(out, new_field, metrics, seconds)
