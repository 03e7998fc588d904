"""Remesh: the fitted field's surface as a clean, watertight mesh (a broken scan in, a closed mesh out)."""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from ..bounds import shown
from ..errors import InvalidInput
from ..extract import bounds_of, decimate, extract_mesh
from ..extract.hole_fill import FILL_MODES, continue_fills
from ..extract.surface_snap import snap_to_scan
from ..mesh import measures
from ..mesh.types import TriangleMesh
from .base import TaskResult, check_param_names, check_stop

#: Remesh reads field values only (extraction, the thin-part check): pipeline.run_edit may hand it
#: the fitted spline as a plain grid, so a command-line rebuild never imports torch.
VALUES_ONLY = True
#: A closed surface needs at least a tetrahedron's 4 faces.
MIN_TARGET_FACES = 4
#: The wire carries at most 20,000,000 rows per array (wire.MAX_DIM): a result cannot have more faces.
MAX_TARGET_FACES = 20_000_000


#: Marching-cubes cells along the longest side when none is given: 256 reproduces a 35k-vertex
#: scan's detail (Chamfer below the voxel remesher's at the same vertex count, see bench remesh).
DEFAULT_RESOLUTION = 256
#: With no resolution given, a finer grid is chosen (up to the field's own) when more than this
#: share of the surface is too thin for the default one (a fin 1/500 thick; see thin.py).
THIN_SHARE = 0.002
#: A result vertex within this many extraction cells of the scan lies on it and stays; farther out
#: over a hole it belongs to the fill (extract.hole_fill). The fill's mean distance to the intact
#: surface of the bench stone: 0.00059 of the diagonal at 0.03 cells, 0.00063 at 0.1, 0.00071 at 0.25.
FILL_ON_SURFACE_CELLS = 0.1


@dataclass(frozen=True)
class Config:
    """resolution : marching-cubes cells along the object's longest side, 16..1024; None (the
        default) = 256, or finer where the field holds parts too thin for 256 (up to the field's
        resolution, at most 1024), so a thin fin comes back attached;
    target_faces : decimate to at most this many faces (0 = keep all), else 4..20,000,000;
    hole_fill : how an open scan's holes are closed: "auto" (default: a hole up to a quarter of
        the longest side continues the surface around it, a wider opening gets a flat lid),
        "smooth" (every hole continues the surface), "flat" (every hole gets the lid)."""

    resolution: int | None = None
    target_faces: int = 0
    hole_fill: str = "auto"

    @classmethod
    def from_params(cls, params: dict, normalization=None) -> "Config":
        check_param_names("remesh", params, ("resolution", "target_faces", "hole_fill"), '{"resolution": 256}')
        resolution = params.get("resolution", cls.resolution)
        target = params.get("target_faces", cls.target_faces)
        if resolution is not None and (isinstance(resolution, bool) or not isinstance(resolution, int)
                                       or not 16 <= resolution <= 1024):
            raise InvalidInput(f"remesh: resolution {shown(resolution)} out of range: use an integer from 16 to 1024")
        if isinstance(target, bool) or not isinstance(target, int) or target < 0:
            raise InvalidInput(f"remesh: target_faces {shown(target)} must be a whole number >= 0 (0 keeps every face)")
        if target and not MIN_TARGET_FACES <= target <= MAX_TARGET_FACES:
            raise InvalidInput(f"remesh: target_faces {shown(target)} is out of range: use 0 (keep every face) or "
                               f"{shown(MIN_TARGET_FACES)} to {shown(MAX_TARGET_FACES)}")
        hole_fill = params.get("hole_fill", cls.hole_fill)
        if hole_fill not in FILL_MODES:
            raise InvalidInput(f"remesh: hole_fill {shown(hole_fill)} unknown: use auto, smooth or flat")
        return cls(resolution, target, hole_fill)


def run(field, mesh: TriangleMesh, config: Config, progress, should_stop) -> TaskResult:
    """Extract the field's zero level set around the input mesh (unit-box coordinates)."""
    t0 = time.perf_counter()
    lo, hi = bounds_of(mesh.vertices)
    resolution = config.resolution or resolution_for(field, mesh, lo, hi)
    stats: dict = {}
    out = extract_mesh(field, lo, hi, resolution, progress, should_stop, stats)
    seconds = {"extract": time.perf_counter() - t0}
    side = float(np.max(np.asarray(hi) - np.asarray(lo)))
    check_stop(should_stop, "laying the result onto the scan")
    t1 = time.perf_counter()
    out, snap = snap_to_scan(out, mesh, side / resolution)
    if snap.vertices_projected:
        seconds["snap"] = time.perf_counter() - t1
    check_stop(should_stop, "hole fill")
    t1 = time.perf_counter()
    out, fills = continue_fills(out, mesh, FILL_ON_SURFACE_CELLS * side / resolution, config.hole_fill, side)
    if fills.holes:
        seconds["hole_fill"] = time.perf_counter() - t1
    if config.target_faces:
        check_stop(should_stop, "decimate")
        t1 = time.perf_counter()
        out = decimate(out, config.target_faces)
        seconds["decimate"] = time.perf_counter() - t1
    metrics = {
        "resolution": float(resolution),
        "evaluated_fraction": stats["evaluations"] / stats["dense_nodes"],
        "volume_change": measures.signed_volume(out.vertices, out.faces) / max(abs(measures.signed_volume(mesh.vertices, mesh.faces)), 1e-300) - 1.0,
    }
    if snap.vertices_projected:
        metrics.update(vertices_on_scan=float(snap.vertices_projected), snap_held_back=float(snap.vertices_held_back),
                       snap_largest_move=snap.largest_move)
    if fills.holes:
        metrics.update(holes_filled=float(fills.holes), holes_continued=float(fills.continued),
                       fill_vertices_moved=float(fills.vertices_moved), fill_largest_move=fills.largest_move)
    return TaskResult(out, field, metrics, seconds)


def resolution_for(field, mesh: TriangleMesh, lo, hi) -> int:
    """DEFAULT_RESOLUTION, doubled (up to the field's resolution, at most 1024) while more than
    THIN_SHARE of the surface is held by the field but too thin for the grid: a point whose
    inside the field reaches half a field cell deep, but which a straight line inward leaves
    again within two grid cells (marching cubes needs a node inside a part to keep it)."""
    from ..field.supervision import sample_surface
    from ..field.thin import HELD_DEPTH_CELLS, not_held

    field_resolution = int(getattr(field, "resolution", DEFAULT_RESOLUTION))
    field_cell = 2 * getattr(field, "half_extent", 0.65) / field_resolution
    points, normals = sample_surface(mesh, 20_000, np.random.default_rng(0))
    held = ~not_held(field, points, normals, HELD_DEPTH_CELLS * field_cell)
    side = float(np.max(np.asarray(hi) - np.asarray(lo)))
    resolution = DEFAULT_RESOLUTION
    while resolution < min(1024, max(field_resolution, DEFAULT_RESOLUTION)):
        too_thin = held & not_held(field, points, normals, 2.0 * side / resolution)
        if too_thin.mean() <= THIN_SHARE:
            break
        resolution *= 2
    return resolution
