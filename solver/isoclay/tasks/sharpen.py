"""Sharpen: undo the rounding of creases and corners, toward where their sides would meet if extended
(energies.crease_sharpen: detected roundness, bounded, no backward flow)."""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from ..energies.crease_sharpen import sharpen_grid
from ..energies.curvature_flow import enclosed_volume, spline_of, unit_box_grid
from ..errors import InvalidInput
from ..mesh.types import TriangleMesh
from .base import TaskResult, check_param_names, check_stop, is_finite_number
from .result_surface import SurfaceOptions, optional_resolution, positive_length, require_bool, surface_of
from .result_surface import shown as _shown

#: Largest roundness to undo, as a fraction of the object's longest side: a rounding must leave
#: flat sides to extend (energies.crease_sharpen.MAX_RADIUS_REL of the shortest extent is what
#: detection considers; a cube rounded to 36% of its side is sharpened, measured).
MAX_RADIUS = 0.4
#: Working grid (cells across the unit box plus margins). 128 cells: roundings down to 1.5 cells
#: (1.2% of the longest side) are found, and a 50k-vertex prop sharpens in about 1.5 s on one
#: core (measured on the bench's anvil block); finer grids cost 8x per doubling.
WORKING_RESOLUTION = 128
#: The new surface is extracted at least this many cells per working-grid cell (then decimated
#: toward the input's size): marching cubes cuts a corner by about a cell, so a 96-vertex cube
#: extracted at 64 cells kept a corner gap of 0.019 of its side where the field's own corner is
#: 0.005 from the sharp one; at 1.25 per field cell (140 cells) the gap is 0.010 (measured).
SURFACE_CELLS_PER_FIELD_CELL = 1.25


@dataclass(frozen=True)
class Config:
    """Sharpen settings (unit-box lengths: the object's longest side is 1).

    amount : (0, 1]; 1 = all the way to where the sides meet, 0.5 = half way
    radius : (0, MAX_RADIUS] unit box, or None: the roundness to undo. Roundings up to 1.5 times it
        are sharpened, gentler surfaces are the sides they lie between (extended with their own
        curvature); None = detected from the field's principal curvatures (metrics
        "roundness_radius_length")
    closed : an open scan comes back trimmed to its scanned footprint unless True
    keep_topology : move the input's own vertices instead of remeshing (cannot add the vertices
        a new crease needs: for small amounts)
    resolution : 16..1024 marching-cubes cells along the longest side, or None (follows the
        input's edge lengths and the edited field's grid, then decimated toward the input's
        face count)
    """

    amount: float
    radius: float | None = None
    closed: bool = False
    keep_topology: bool = False
    resolution: int | None = None

    KNOWN = ("amount", "radius", "closed", "keep_topology", "resolution")

    @classmethod
    def from_params(cls, params: dict, normalization=None) -> "Config":
        """params in the mesh's own units: amount (0..1), radius (length, optional), closed, keep_topology, resolution."""
        check_param_names("sharpen", params, cls.KNOWN, '{"amount": 0.5}')
        if "amount" not in params:
            raise InvalidInput("sharpen: amount is missing: give a value from 0 to 1 (1 = fully sharp creases)")
        a = params["amount"]
        if not is_finite_number(a) or not 0 < a <= 1:
            shown = repr(a) if isinstance(a, (int, float)) and abs(a) < 1e6 else "given"
            raise InvalidInput(f"sharpen: amount {shown} out of range: use a value above 0 and at most 1 (1 = fully sharp creases)")
        radius = None
        if params.get("radius") is not None:
            r = positive_length("sharpen", "radius", params["radius"], "the roundness to undo")
            radius = normalization.length_to_unit(r) if normalization is not None else r
            if radius > MAX_RADIUS:
                size = normalization.length_from_unit(1.0) if normalization is not None else 1.0
                raise InvalidInput(
                    f"sharpen: radius {_shown(r)} is too large for an object {size:.4g} long (at most {MAX_RADIUS * size:.4g}): "
                    "give the radius of the roundings to undo, or leave it out to detect them"
                )
        return cls(
            amount=float(a),
            radius=None if radius is None else float(radius),
            closed=require_bool("sharpen", "closed", params.get("closed", False)),
            keep_topology=require_bool("sharpen", "keep_topology", params.get("keep_topology", False)),
            resolution=optional_resolution("sharpen", params),
        )


def run(field, mesh: TriangleMesh, config: Config, progress, should_stop) -> TaskResult:
    """Sharpen the field's roundings; return the new field and its surface (unit box)."""
    t0 = time.perf_counter()
    progress("sharpen", 0.0, {})
    grid = unit_box_grid(field, WORKING_RESOLUTION)
    volume_before = enclosed_volume(grid)
    check_stop(should_stop, "sharpen")
    report = sharpen_grid(grid, config.amount, config.radius, should_stop)
    new_field = spline_of(grid)
    found = report.roundings
    progress("sharpen", 1.0, {"changed": report.changed, "radius": found.radius})
    seconds = {"sharpen": time.perf_counter() - t0}
    least = int(np.ceil(SURFACE_CELLS_PER_FIELD_CELL / grid.cell))
    options = SurfaceOptions(config.keep_topology, config.resolution, config.closed, "soft", grid.cell, least)
    out, more = surface_of(new_field, mesh, options, progress, should_stop, seconds, "sharpen")
    metrics = {
        "field_volume_change": enclosed_volume(grid) / max(volume_before, 1e-300) - 1.0,
        "roundness_radius_length": float(found.radius) if found.radius is not None else 0.0,
        "rounding_samples": float(found.fillet),
        "crease_samples": float(found.creases),
        "side_patches": float(found.patches),
        "changed_nodes": float(report.changed),
        "field_change_max_length": report.max_change,
        **more,
    }
    return TaskResult(out, new_field, metrics, seconds)
