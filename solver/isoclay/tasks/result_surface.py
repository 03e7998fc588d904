"""The output surface of a field edit (smooth, sharpen) and the options both tasks share.

Either the input's own vertices projected onto the new level set (keep topology), or a new mesh:
narrow-band marching cubes at a resolution that follows the input's edge lengths and the edited
field's grid, crease restoration where the data shows creases, decimation back toward the
input's face count, and a trim to the scanned footprint when the input was an open scan.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from ..errors import InvalidInput
from ..mesh import measures
from ..mesh.types import TriangleMesh
from .base import check_stop, face_normals, is_finite_number

#: Keep-topology output is refused when a vertex would move farther than this (object
#: longest side = 1): projection that far could jump across thin parts.
MAX_PROJECTION_MOVE = 0.05
#: Fraction of triangles allowed to newly face inward after projection (slivers of a noisy scan).
MAX_NEW_INVERTED = 1e-3
#: Marching-cubes resolution range (cells along the longest side) when it follows the input:
#: at least 64 (a prop's creases and lettering need that many), at most two per cell of the
#: edited field (finer cells only resample the same spline).
AUTO_RESOLUTION_MIN = 64
AUTO_CELLS_PER_FIELD_CELL = 2.0
#: A new mesh with more than DECIMATE_ABOVE times the wanted faces is decimated to
#: max(input faces, MIN_FACES) (a 96-vertex cube came back with 322k vertices before).
DECIMATE_ABOVE = 1.5
MIN_FACES = 2000
#: Patch radius of the crease restoration, in cells of the edited field's grid: the rounding it
#: undoes is one to two cells wide (measured on the bench's chamfered block at 0.4% noise:
#: feature-region normal error 9.7 -> 4.6 deg at 3.5 cells, 5.0 at 3, 5.9 at 2).
CREASE_PATCH_CELLS = 3.5


def require_bool(task: str, name: str, value) -> bool:
    if not isinstance(value, bool):
        raise InvalidInput(f"{task}: {name} must be true or false, got {value!r}")
    return value


def require_int(task: str, name: str, value, lo: int, hi: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
        shown = repr(value) if isinstance(value, int) and not isinstance(value, bool) and abs(value) < 10**9 else "given"
        raise InvalidInput(f"{task}: {name} {shown} out of range: use a whole number from {lo} to {hi}")
    return value


def optional_resolution(task: str, params: dict) -> int | None:
    """resolution: None (follow the input) or a whole number 16..1024 (cells along the longest side)."""
    value = params.get("resolution")
    if value is None:
        return None
    return require_int(task, "resolution", value, 16, 1024)


def positive_length(task: str, name: str, value, meaning: str) -> float:
    """A finite positive length (the mesh's units) or a one-line refusal."""
    if not is_finite_number(value) or value <= 0:
        shown = f"{value!r}" if isinstance(value, (int, float, str)) and len(repr(value)) < 24 else "given"
        raise InvalidInput(f"{task}: {name} {shown} must be a positive length in the mesh's units ({meaning})")
    return float(value)


def shown(value: float) -> str:
    """A length as the artist typed it, or "given" when echoing it back would be absurd."""
    return f"{value:.4g}" if abs(value) < 1e9 else "given"


@dataclass(frozen=True)
class SurfaceOptions:
    """keep_topology : project the input's vertices instead of remeshing
    resolution : marching-cubes cells along the longest side, or None to follow the input
    closed : keep the closed surface of an open scan (False trims it to the scanned footprint)
    creases : "auto" (restore creases only between flat sides), "crisp" (wherever a rounded strip
        shows), "soft" (never)
    cell : the edited field's grid cell (unit box)
    min_resolution : the fewest marching-cubes cells along the longest side when the resolution
        follows the input (a sharpened corner needs cells finer than a coarse input's edges)
    """

    keep_topology: bool
    resolution: int | None
    closed: bool
    creases: str
    cell: float
    min_resolution: int = AUTO_RESOLUTION_MIN


def auto_resolution(mesh: TriangleMesh, cell: float, least: int = AUTO_RESOLUTION_MIN) -> int:
    """Cells along the longest side so the new mesh's edges are about the input's median edge,
    between `least` and AUTO_CELLS_PER_FIELD_CELL per field cell."""
    e = mesh.vertices[mesh.faces]
    lengths = np.linalg.norm(np.concatenate([e[:, 1] - e[:, 0], e[:, 2] - e[:, 1], e[:, 0] - e[:, 2]]), axis=1)
    median = float(np.median(lengths)) if len(lengths) else 1.0
    side = float(np.max(mesh.vertices.max(0) - mesh.vertices.min(0))) if mesh.n_vertices else 1.0
    top = max(least, int(np.ceil(AUTO_CELLS_PER_FIELD_CELL * side / cell)))
    return int(np.clip(np.ceil(side / max(median, 1e-9)), least, top))


def surface_of(new_field, mesh: TriangleMesh, options: SurfaceOptions, progress, should_stop, seconds: dict, task: str):
    """The output surface and its metrics (mesh, dict); seconds gains the stages' wall times.

    Keep-topology meshes carry per-vertex "moved" (unit-box lengths).
    """
    t1 = time.perf_counter()
    check_stop(should_stop, "extract")
    more: dict = {}
    if options.keep_topology:
        out = project_vertices(new_field, mesh, task)
        moved = out.vertex_values["moved"]
        more = {"moved_max": float(moved.max()), "moved_mean": float(moved.mean())}
        seconds["project"] = time.perf_counter() - t1
    else:
        from ..extract import bounds_of, decimate, extract_mesh
        from ..extract.footprint import trim_to_footprint

        resolution = options.resolution or auto_resolution(mesh, options.cell, options.min_resolution)
        lo, hi = bounds_of(mesh.vertices, margin=0.05)
        out = extract_mesh(new_field, lo, hi, resolution, progress, should_stop)
        more["surface_resolution"] = float(resolution)
        seconds["extract"] = time.perf_counter() - t1
        if options.creases != "soft":
            from ..extract.creases import restore_creases

            t2 = time.perf_counter()
            progress("creases", 0.0, {})
            out, report = restore_creases(out, CREASE_PATCH_CELLS * options.cell, should_stop,
                                          flat_sides_only=options.creases == "auto")
            progress("creases", 1.0, {"faces": report.faces_guided})
            more.update(crease_faces=float(report.faces_guided), crease_largest_move=report.largest_move)
            seconds["creases"] = time.perf_counter() - t2
        wanted = max(mesh.n_faces, MIN_FACES)
        if options.resolution is None and out.n_faces > DECIMATE_ABOVE * wanted:
            t3 = time.perf_counter()
            check_stop(should_stop, "decimate")
            out = decimate(out, wanted, quadric=True)
            seconds["decimate"] = time.perf_counter() - t3
        if not options.closed:
            t4 = time.perf_counter()
            out, trim = trim_to_footprint(out, mesh, 0.25 * options.cell)
            if trim.open_edges_input:
                more["trimmed_faces"] = float(trim.faces_removed)
                seconds["trim"] = time.perf_counter() - t4
    before = abs(measures.signed_volume(mesh.vertices, mesh.faces))
    more["volume_change"] = measures.signed_volume(out.vertices, out.faces) / max(before, 1e-300) - 1.0
    seconds["total"] = sum(v for k, v in seconds.items() if k != "total")
    return out, more


def project_vertices(field, mesh: TriangleMesh, task: str) -> TriangleMesh:
    """Move each input vertex onto the field's zero level set along the gradient (unit box).

    Refuses (InvalidInput) when the move is not safe: a vertex would travel farther than
    MAX_PROJECTION_MOVE or fail to reach the surface, or more than MAX_NEW_INVERTED of the
    triangles would end up facing into the object when they did not before (tangling).
    Triangles that already faced inward in a noisy input are not counted against the edit.
    """
    from ..geometry import evaluate, project_to_level_set

    moved_to, residual = project_to_level_set(field, mesh.vertices, iterations=12)
    moved = np.linalg.norm(moved_to - mesh.vertices, axis=1)
    advice = "drop --keep-topology to get a remeshed result, or use a gentler setting"
    if moved.max() > MAX_PROJECTION_MOVE:
        raise InvalidInput(
            f"{task} --keep-topology: vertex {int(moved.argmax())} would move {moved.max():.3g} of the object's size "
            f"(limit {MAX_PROJECTION_MOVE:g}), too far to keep the mesh: {advice}"
        )
    if residual.max() > 1e-3:
        raise InvalidInput(f"{task} --keep-topology: {int((residual > 1e-3).sum())} vertices could not reach the new surface: {advice}")
    inverted_before = _inverted(field, mesh.vertices, mesh.faces, evaluate)
    inverted_after = _inverted(field, moved_to, mesh.faces, evaluate)
    new = int((inverted_after & ~inverted_before).sum())
    if new > MAX_NEW_INVERTED * len(mesh.faces):
        raise InvalidInput(f"{task} --keep-topology: {new} triangles would turn over when projected: {advice}")
    return mesh.with_vertices(moved_to, moved=moved)


def _inverted(field, vertices, faces, evaluate) -> np.ndarray:
    """(m,) True where a triangle's normal points against the field gradient at its centroid."""
    centroids = vertices[faces].mean(axis=1)
    grad = evaluate(field, centroids).gradient
    return (face_normals(vertices, faces) * grad).sum(1) < 0
