"""Smooth: remove bumps smaller than a given size from the fitted field, keeping creases and volume.

Method (measured in `isoclay bench`, section smooth): the field's node values on its spline grid
are filtered in two rounds; each round computes feature-preserving target normals by bilateral
filtering at the requested scale (energies.feature_normals), then runs the level-set flow toward
them, phi_t = |grad phi| (kappa - div N) (energies.curvature_flow; Tasdizen et al. 2002), with
the mean speed removed so the volume stays put. Noise has normals scattered at small scale and
is averaged away; a crease has two consistent families of normals and stays.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from ..energies.curvature_flow import curvature_flow, enclosed_volume, node_grid_of, spline_of
from ..energies.feature_normals import bilateral_normals
from ..errors import InvalidInput
from ..mesh import measures
from ..mesh.types import TriangleMesh
from .base import TaskResult, check_param_names, check_stop, face_normals, is_finite_number

#: Largest strength accepted, as a fraction of the object's longest side: beyond it the whole
#: object is a "bump" and smoothing would melt it.
MAX_STRENGTH_REL = 0.25
#: Flow time per round in units of strength^2: ripples of wavelength `strength` decay by
#: exp(-(2 pi)^2 * 0.08) ~ 1/24 per round (common practice, no source).
FLOW_TIME_PER_STRENGTH2 = 0.08
#: Keep-topology output is refused when a vertex would move farther than this (object
#: longest side = 1): projection that far could jump across thin parts.
MAX_PROJECTION_MOVE = 0.05


def _require_bool(task: str, name: str, value) -> bool:
    if not isinstance(value, bool):
        raise InvalidInput(f"{task}: {name} must be true or false, got {value!r}")
    return value


def _require_int(task: str, name: str, value, lo: int, hi: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
        raise InvalidInput(f"{task}: {name} {value!r} out of range: use a whole number from {lo} to {hi}")
    return value


@dataclass(frozen=True)
class Config:
    """strength : unit-box length; bumps smaller than this are removed (the object's longest side is 1)
    preserve_volume : keep the enclosed volume (default) or let the flow shrink convex parts
    keep_topology : move the input's own vertices onto the new surface instead of remeshing
    resolution : marching-cubes cells along the longest side for the remeshed output
    crisp_creases : after remeshing, put back the sharpness the field's grid rounds off creases
        (extract.creases): for hard-surface props; off by default because it leaves needle
        triangles on lumpy organic surfaces
    rounds : filter-then-flow rounds
    range_sigma : normal-similarity width of the bilateral filter (smaller keeps more creases)
    """

    strength: float
    preserve_volume: bool = True
    keep_topology: bool = False
    resolution: int = 256
    crisp_creases: bool = False
    rounds: int = 2
    range_sigma: float = 0.15

    KNOWN = ("strength", "preserve_volume", "keep_topology", "resolution", "crisp_creases")

    @classmethod
    def from_params(cls, params: dict, normalization=None) -> "Config":
        """params in the mesh's own units: strength (length), preserve_volume, keep_topology, resolution, crisp_creases."""
        check_param_names("smooth", params, cls.KNOWN, '{"strength": 0.01}')
        if "strength" not in params:
            raise InvalidInput("smooth: strength is missing: give the size of the bumps to remove, in the mesh's units")
        s = params["strength"]
        if not is_finite_number(s) or s <= 0:
            raise InvalidInput(f"smooth: strength {s!r} must be a positive length in the mesh's units (size of the bumps to remove)")
        unit = normalization.length_to_unit(s) if normalization is not None else float(s)
        if unit > MAX_STRENGTH_REL:
            size = normalization.length_from_unit(1.0) if normalization is not None else 1.0
            raise InvalidInput(
                f"smooth: strength {s:g} is too large for an object {size:.4g} long (limit {MAX_STRENGTH_REL * size:.4g}): "
                "give the size of the bumps to remove, not of the object"
            )
        return cls(
            strength=float(unit),
            preserve_volume=_require_bool("smooth", "preserve_volume", params.get("preserve_volume", True)),
            keep_topology=_require_bool("smooth", "keep_topology", params.get("keep_topology", False)),
            resolution=_require_int("smooth", "resolution", params.get("resolution", cls.resolution), 16, 1024),
            crisp_creases=_require_bool("smooth", "crisp_creases", params.get("crisp_creases", False)),
        )


def smooth_grid(grid, config: Config, progress, should_stop) -> dict:
    """Run the rounds of filtering and flow on a NodeGrid in place; returns figures."""
    figures = {"passes": 0, "steps": 0}
    for r in range(config.rounds):
        check_stop(should_stop, "smooth")
        target = bilateral_normals(grid, config.strength, config.range_sigma, should_stop=should_stop)
        figures["passes"] += target.passes
        report = curvature_flow(
            grid,
            FLOW_TIME_PER_STRENGTH2 * config.strength**2,
            config.preserve_volume,
            target.normals,
            progress=lambda f, r=r: progress("smooth", (r + f) / config.rounds, {"round": r + 1}),
            should_stop=should_stop,
        )
        figures["steps"] += report.steps
    return figures


def run(field, mesh: TriangleMesh, config: Config, progress, should_stop) -> TaskResult:
    """Smooth the field and return the new field with a remeshed or vertex-projected surface (unit box)."""
    t0 = time.perf_counter()
    grid = node_grid_of(field)
    volume_before = enclosed_volume(grid)
    figures = smooth_grid(grid, config, progress, should_stop)
    new_field = spline_of(grid)
    seconds = {"smooth": time.perf_counter() - t0}
    crease_radius = CREASE_PATCH_CELLS * grid.cell if config.crisp_creases else None
    out, more = surface_of(new_field, mesh, config.keep_topology, config.resolution, progress, should_stop, seconds, "smooth",
                           crease_radius)
    metrics = {
        "field_volume_change": enclosed_volume(grid) / max(volume_before, 1e-300) - 1.0,
        "flow_steps": float(figures["steps"]),
        "filter_passes": float(figures["passes"]),
        "grid_cell_length": grid.cell,
        "strength_in_grid_cells": config.strength / grid.cell,
        **more,
    }
    return TaskResult(out, new_field, metrics, seconds)


#: Patch radius of the crease restoration, in field grid cells: the rounding it undoes is one
#: to two cells wide (measured on the bench's chamfered block at 0.4% noise: feature-region
#: normal error 9.7 -> 4.6 deg at 3.5 cells, 5.0 at 3, 5.9 at 2; smooth tori untouched at all three).
CREASE_PATCH_CELLS = 3.5


def surface_of(new_field, mesh: TriangleMesh, keep_topology: bool, resolution: int, progress, should_stop, seconds: dict, task: str,
               crease_radius: float | None = None):
    """The output surface: the input's vertices projected onto the new level set, or a new mesh.

    crease_radius : when given, a new mesh gets its creases restored (extract.creases) with
        patches of this radius (unit box); the metrics then carry crease_faces and
        crease_largest_move.
    Returns (mesh, metrics). Keep-topology meshes carry per-vertex "moved" (unit-box lengths).
    """
    t1 = time.perf_counter()
    check_stop(should_stop, "extract")
    if keep_topology:
        out = project_vertices(new_field, mesh, task)
        moved = out.vertex_values["moved"]
        more = {"moved_max": float(moved.max()), "moved_mean": float(moved.mean())}
        seconds["project"] = time.perf_counter() - t1
    else:
        from ..extract import bounds_of, extract_mesh

        lo, hi = bounds_of(mesh.vertices, margin=0.05)
        out = extract_mesh(new_field, lo, hi, resolution, progress, should_stop)
        more = {}
        seconds["extract"] = time.perf_counter() - t1
        if crease_radius is not None:
            from ..extract.creases import restore_creases

            t2 = time.perf_counter()
            progress("creases", 0.0, {})
            out, report = restore_creases(out, crease_radius, should_stop)
            progress("creases", 1.0, {"faces": report.faces_guided})
            more.update(crease_faces=float(report.faces_guided), crease_largest_move=report.largest_move)
            seconds["creases"] = time.perf_counter() - t2
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


#: Fraction of triangles allowed to newly face inward after projection (slivers of a noisy scan).
MAX_NEW_INVERTED = 1e-3


def _inverted(field, vertices, faces, evaluate) -> np.ndarray:
    """(m,) True where a triangle's normal points against the field gradient at its centroid."""
    centroids = vertices[faces].mean(axis=1)
    grad = evaluate(field, centroids).gradient
    return (face_normals(vertices, faces) * grad).sum(1) < 0
