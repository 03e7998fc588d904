"""Elastic deformation of a solid: handles go to their targets, the prop follows as the solid it is.

The field tells inside from outside everywhere, so the prop's interior is sampled without any
tetrahedral mesh: loose touching parts, open scans and non-manifold props all have one.
A smooth map phi over that interior (warp.lattice: a quadratic B-spline control lattice with
control points split per piece of material) minimises a volumetric elastic energy
(energies.elastic: as-rigid-as-possible elasticity of the solid, Chao et al. 2010, plus a volume
term whose weight the stiffness setting chooses) while the handle points go where their groups'
targets put them: moved, turned and scaled with the target empty (positions, and the turn too
where the held points alone cannot fix it). It is solved by local-global steps on a matrix
factorised once, Anderson-accelerated, until the energy and the map stop changing.

A thin sheet (a banner, a leaf: no inside) is deformed as a slab of the stiffness's thickness
around its surface, and its own vertices are carried.

Output: the input's own vertices moved by phi (keep_topology: nothing else changes, so faces,
UVs and materials survive and no face flips where phi is injective, which is checked), or the
field's zero level set extracted in the input's space and carried by phi (watertight, because
phi is one-to-one there), with per-vertex "stretch" and "bend". TaskResult.rest_points holds each
result vertex's point in the input, so UVs follow the material. docs/deformation.md says why this
design was chosen over the invertible residual warp (warp.residual) that came before it.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from ..energies.elastic import Constraints, ElasticSystem, SolveSettings
from ..energies.mesh_distortion import edge_bend, face_stretch, flipped_faces
from ..errors import InvalidInput
from ..geometry.field_values import values as field_values
from ..mesh import measures
from ..mesh.types import TriangleMesh
from ..warp.lattice import SplineLattice
from .base import TaskResult, check_stop, is_finite_number, never_stop, no_progress
from .handles import SURFACE_TOLERANCE_REL, HandleGroup, check_on_surface, parse_groups
from .stiffness import DEFAULT_STIFFNESS, STIFFNESS, Material  # noqa: F401 (part of this task's interface)


_KNOWN_PARAMS = {"handles", "targets", "groups", "stiffness", "keep_topology", "resolution", "seed", "max_iterations",
                 "handle_blob"}


def material_of(value) -> Material:
    """A stiffness name (see STIFFNESS) -> Material; InvalidInput otherwise."""
    if isinstance(value, str) and value.strip().lower() in STIFFNESS:
        return STIFFNESS[value.strip().lower()]
    raise InvalidInput(f"unknown stiffness {str(value)[:40]!r}: use one of {', '.join(STIFFNESS)}")


@dataclass(frozen=True)
class Config:
    """Settings of one deformation, in unit-box coordinates (see mesh.Normalization).

    groups : handle groups (points, targets, transform) in the unit box
    stiffness : the name behind material
    material : volume weight and sheet thickness (see STIFFNESS)
    keep_topology : return the input's faces with moved vertices instead of a new mesh
    resolution : marching-cubes cells along the longest side of the remeshed result (16..1024)
    cells_across : lattice cells across the prop's typical thickness 4 V / A (a rod's diameter):
        3 gives the twisted bar within 0.05% of the diagonal of the tetrahedral reference, 2
        within 0.07% (measured); thin parts get finer cells
    cell_min, cell_max : bounds on the lattice cell (unit-box lengths): finer than 1/160 costs
        more than the field's own resolution can give back; coarser than 1/24 misses the shape
        of a handle's region on bulky props
    max_cells : active-cell budget; the cell grows until the estimate fits. The factorisation
        dominates on bulky props and grows about as the square of the controls (measured on a
        lump of clay: 4.2k controls 0.6 s, 7.2k 2.5 s, 11.5k 6.3 s); at 1/16 of the lump its
        result is within 0.11% (mean) of the reference, at 1/24 within 0.08%
    handle_stiffness : spring weight per handle point, times the cell size (the lattice's own
        stiffness per control point is ~ one cell): 1e3 holds handles to ~1e-6 of the diagonal
        on the bench cases while the matrix stays well conditioned
    orient_stiffness : weight of a held turn per unit volume of the cells it applies in: 1e3 turns
        a bar's end held at one vertex to within 0.5 degrees of the asked 30 (measured)
    max_iterations : local-global iterations before giving up with a one-line note
    handle_tolerance_rel : a result whose handles are further than this fraction of the
        diagonal from their targets says so
    units_per_length : world units per unit-box length (messages only)
    """

    groups: tuple[HandleGroup, ...]
    stiffness: str = DEFAULT_STIFFNESS
    material: Material = STIFFNESS[DEFAULT_STIFFNESS]
    keep_topology: bool = False
    resolution: int = 160
    cells_across: float = 3.0
    cell_min: float = 1.0 / 160
    cell_max: float = 1.0 / 24
    max_cells: int = 5_000
    handle_stiffness: float = 1e3
    orient_stiffness: float = 1e3
    max_iterations: int = 1500
    handle_tolerance_rel: float = 5e-3
    seed: int = 0
    units_per_length: float = 1.0
    solve: SolveSettings = field(default_factory=SolveSettings)

    @classmethod
    def from_params(cls, params: dict, normalization) -> "Config":
        """From JSON-like params in world units: handles + targets, or groups (see tasks.handles),
        stiffness, keep_topology, resolution, seed, max_iterations; InvalidInput (one line) on bad input."""
        if not isinstance(params, dict):
            raise InvalidInput("deform settings must be an object with \"groups\" or \"handles\" and \"targets\"")
        unknown = sorted(set(params) - _KNOWN_PARAMS)
        if unknown:
            raise InvalidInput(f"unknown deform setting {unknown[0]!r}: known settings are "
                               f"{', '.join(sorted(_KNOWN_PARAMS - {'handle_blob'}))}")
        groups = parse_groups(params)
        keep = params.get("keep_topology", False)
        if not isinstance(keep, bool):
            raise InvalidInput(f"keep_topology must be true or false, found {keep!r}")
        extra = {}
        for name, lo, hi in (("resolution", 16, 1024), ("max_iterations", 10, 20_000)):
            if name in params:
                v = params[name]
                if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
                    raise InvalidInput(f"{name} {str(v)[:20]} is out of range: use a whole number from {lo} to {hi}")
                extra[name] = v
        if "seed" in params:
            s = params["seed"]
            if isinstance(s, bool) or not isinstance(s, int):
                raise InvalidInput(f"seed must be a whole number, found {str(s)[:20]}")
            extra["seed"] = s
        name = str(params.get("stiffness", DEFAULT_STIFFNESS)).strip().lower()
        material = material_of(name)
        unit_groups = tuple(_group_to_unit(g, normalization) for g in groups)
        return cls(groups=unit_groups, stiffness=name, material=material, keep_topology=keep,
                   units_per_length=1.0 / float(normalization.scale), **extra)


def _group_to_unit(group: HandleGroup, normalization) -> HandleGroup:
    """A group in unit-box coordinates: points and targets mapped, the transform conjugated
    (T_unit(x) = L x + s (L c + t - c) for world T(x) = L x + t, centre c and scale s)."""
    points = normalization.to_unit(group.points)
    targets = normalization.to_unit(group.targets)
    transform = None
    if group.transform is not None:
        c, s = np.asarray(normalization.center), float(normalization.scale)
        lin, t = group.transform[:3, :3], group.transform[:3, 3]
        transform = np.eye(4)
        transform[:3, :3] = lin
        transform[:3, 3] = s * (lin @ c + t - c)
    return HandleGroup(points, targets, transform, group.name)


# ------------------------------------------------------------------------- the prop's solid


def field_values_fn(field):
    """values(points (n, 3) float64) -> (n,) float64 for the field: its compiled path when it has one."""
    fast = getattr(field, "fast_values", None)
    if callable(fast):
        return lambda p: np.asarray(fast(p), dtype=np.float64)
    return lambda p: np.asarray(field_values(field, p), dtype=np.float64)


@dataclass(frozen=True)
class Solid:
    """What is deformed: values (callable, negative inside), sheet (a thin shell thickened around a
    surface with no inside), thickness (4 V / A, unit box), lattice cell chosen for it."""

    values: object
    sheet: bool
    thickness: float
    cell: float


#: A prop whose inside is thinner than this (volume over surface area, unit-box lengths) is a
#: sheet: the field's own smoothing leaves a film of about a third of its cell (1/128) under an
#: open plane, 0.0013 over area measured, while the thinnest solid it holds is about a cell.
SHEET_VOLUME_PER_AREA = 0.003


def choose_solid(field, mesh: TriangleMesh, config: Config, lo, hi) -> Solid:
    """Measure the prop's interior on a coarse lattice and pick the lattice cell (see Config)."""
    values = field_values_fn(field)
    area = float(measures.face_areas(mesh.vertices, mesh.faces).sum())
    try:
        volume = SplineLattice.build(values, lo, hi, config.cell_max, subdivisions=4).volume
    except ValueError:  # nothing inside at all
        volume = 0.0
    # no inside the field can hold (thinner than about half its cell): a sheet, a banner, a leaf
    sheet = volume < SHEET_VOLUME_PER_AREA * area
    if sheet:
        half = 0.5 * config.material.sheet_thickness
        thickness = 2.0 * half
        values = _thickened(values, half)
        volume = 2.0 * half * 0.5 * area  # both sides of the sheet count in the area
    else:
        thickness = 4.0 * volume / max(area, 1e-12)
    cell = float(np.clip(thickness / config.cells_across, config.cell_min, config.cell_max))
    for _ in range(20):  # grow the cell until the active-cell estimate fits the budget
        estimate = volume / cell**3 + 2.0 * area / cell**2
        if estimate <= config.max_cells:
            break
        cell *= (estimate / config.max_cells) ** (1.0 / 3.0)
    return Solid(values, sheet, thickness, cell)


#: Above this many controls the solve starts from the answer on a lattice of twice the cell
#: (recursively): on a 41k-vertex lump, 131 iterations from rest (15.2 s) became 76 cheap coarse
#: ones and 26 fine ones (4.1 s in all), the same result to 5e-6 (measured).
COARSE_START_CONTROLS = 1500


def _levels(solid: Solid, lo, hi, config: "Config", should_stop) -> list:
    """Lattices from coarse to fine, the finest at the solid's cell; coarser ones only while the finer
    has more than COARSE_START_CONTROLS controls and the coarser still holds the handles' cells."""
    fine = SplineLattice.build(solid.values, lo, hi, solid.cell, should_stop=should_stop)
    levels = [fine]
    while levels[0].n_dofs > COARSE_START_CONTROLS and len(levels) < 4:
        try:
            coarse = SplineLattice.build(solid.values, lo, hi, 2.0 * levels[0].cell, should_stop=should_stop)
        except ValueError:
            break
        if coarse.n_dofs < 64:
            break
        levels.insert(0, coarse)
    return levels


def _thickened(values, half: float):
    return lambda p: np.abs(values(p)) - half


# ------------------------------------------------------------------------- handles -> constraints


def reduce_points(points: np.ndarray, targets: np.ndarray, spacing: float) -> tuple[np.ndarray, np.ndarray]:
    """Keep one point per cube of side ``spacing`` (the first seen): a 44k-vertex selection holds a
    region no better than the few points per lattice cell that remain."""
    keys = np.floor(points / spacing).astype(np.int64)
    _, keep = np.unique(keys, axis=0, return_index=True)
    keep = np.sort(keep)
    return points[keep], targets[keep]


def build_constraints(groups, lattice: SplineLattice, config: Config) -> Constraints:
    """Positional springs for every kept handle point; a held turn where a group's points cannot fix it.

    A group fixes its own turn unless it has fewer than three points or they lie on a line. Then
    the empty's turn is held over the solid in the lattice cells around the group's points (the
    cells they lie in and their neighbours; every quadrature point there, weighted by the volume
    it carries): a turn held at a single point would be a point couple, which a continuum absorbs
    in a tiny neighbourhood (measured: a bar's end held that way turned 12 of the asked 30 degrees;
    over the cells it lies in only, 21; with their neighbours, see the test).
    """
    cell = lattice.cell
    pts, tgts, o_pts, o_tgts, o_w = [], [], [], [], []
    for g in groups:
        p, t = reduce_points(g.points, g.targets, 0.5 * cell)
        pts.append(p)
        tgts.append(t)
        if g.transform is not None and _collinear(g.points):
            # a vertex, or a line of them, fixes no turn: hold the gradient to the empty's turn and scale
            cells = _cells_around(lattice, np.unique(lattice.locate(p)[0]))
            q = (lattice.origin + (lattice.cells[cells][:, None, :] + lattice.quadrature[None]) * cell).reshape(-1, 3)
            w = lattice.weights[cells].ravel()
            keep = w > 0
            o_pts.append(q[keep])
            o_tgts.append(np.repeat(g.transform[None, :3, :3], int(keep.sum()), axis=0))
            o_w.append(config.orient_stiffness * w[keep])
    points = np.concatenate(pts)
    o_points = np.concatenate(o_pts) if o_pts else np.zeros((0, 3))
    return Constraints(
        points, np.concatenate(tgts), np.full(len(points), config.handle_stiffness * cell),
        o_points, np.concatenate(o_tgts) if o_tgts else np.zeros((0, 3, 3)),
        np.concatenate(o_w) if o_w else np.zeros(0),
    )


def _collinear(points: np.ndarray) -> bool:
    """True for fewer than three points, or points within 2% of their extent of one line."""
    if len(points) < 3:
        return True
    sv = np.linalg.svd(points - points.mean(axis=0), compute_uv=False)
    return bool(sv[1] <= 0.02 * sv[0])


def _cells_around(lattice: SplineLattice, cells: np.ndarray) -> np.ndarray:
    """Active cells among the given ones and their 26 neighbours (indices into lattice.cells)."""
    near = (lattice.cells[cells][:, None, :] + np.array(list(np.ndindex(3, 3, 3))) - 1).reshape(-1, 3)
    inside = np.all((near >= 0) & (near < lattice.shape), axis=1)
    found = lattice.cell_index[tuple(near[inside].T)]
    return np.unique(found[found >= 0])


def rigid_fit(handles: np.ndarray, targets: np.ndarray):
    """Best rigid motion targets ~ R handles + t (Kabsch 1976): (rotation (3, 3), t (3,), max residual).

    With fewer than three handles, or collinear ones, the rotation is left out (pure translation).
    """
    ch, ct = handles.mean(axis=0), targets.mean(axis=0)
    a, b = handles - ch, targets - ct
    rot = np.eye(3)
    if len(handles) >= 3 and np.linalg.svd(a, compute_uv=False)[1] > 1e-6:
        u, _, vt = np.linalg.svd(a.T @ b)
        d = np.sign(np.linalg.det(vt.T @ u.T)) or 1.0
        rot = vt.T @ np.diag([1.0, 1.0, d]) @ u.T
    t = ct - rot @ ch
    residual = float(np.linalg.norm(handles @ rot.T + t - targets, axis=1).max())
    return rot, t, residual


# ------------------------------------------------------------------------- output measures


def vertex_distortion(rest: np.ndarray, moved: np.ndarray, faces: np.ndarray, diagonal: float):
    """Per-vertex (stretch, bend) (n,) float32 of a mesh carried from rest to moved.

    stretch : area-weighted mean over the vertex's faces of the RMS deviation of the face metric's
        eigenvalues from 1 (energies.mesh_distortion.face_stretch; s^2 - 1 for a uniform scale s)
    bend : mean over the vertex's edges of the change of the edge's curvature |d theta| |e| 3 / (A1 + A2)
        (discrete shells, Grinspun et al. 2003), times the bounding-box diagonal (dimensionless)
    """
    n = len(rest)
    s = face_stretch(rest, moved, faces)
    area = 0.5 * np.linalg.norm(np.cross(rest[faces[:, 1]] - rest[faces[:, 0]], rest[faces[:, 2]] - rest[faces[:, 0]]), axis=1)
    num = np.bincount(faces.ravel(), weights=np.repeat(s * area, 3), minlength=n)
    den = np.bincount(faces.ravel(), weights=np.repeat(area, 3), minlength=n)
    stretch = num / np.maximum(den, 1e-300)
    from ..energies.mesh_distortion import _interior_edges

    edges, edge_faces = _interior_edges(faces)
    _, dtheta = edge_bend(rest, moved, faces)
    length = np.linalg.norm(rest[edges[:, 1]] - rest[edges[:, 0]], axis=1)
    curvature = dtheta * length * 3.0 / np.maximum(area[edge_faces].sum(axis=1), 1e-300)
    total = np.bincount(edges.ravel(), weights=np.repeat(curvature, 2), minlength=n)
    count = np.bincount(edges.ravel(), minlength=n)
    bend = total / np.maximum(count, 1) * diagonal
    return np.nan_to_num(stretch).astype(np.float32), np.nan_to_num(bend).astype(np.float32)


def _fold_check(lattice: SplineLattice, control: np.ndarray, extra_points: np.ndarray, units: float,
                extra_jacobians: np.ndarray | None = None) -> float:
    """Smallest det J over the quadrature points inside the solid and the result's rest points; refuses a fold.

    A sub-cell point counts as inside when at least half its sub-cell is (its field value <= 0):
    the smeared indicator also weighs points just outside the surface, where the map is only the
    cell's polynomial carried on and no material is.
    """
    inside = lattice.weights >= 0.5 * lattice.cell**3 / len(lattice.quadrature)
    if extra_jacobians is None:
        extra_jacobians = lattice.jacobian(control, extra_points)
    det = np.concatenate([np.linalg.det(lattice.quadrature_jacobians(control)[inside]), np.linalg.det(extra_jacobians)])
    worst = int(np.argmin(det))
    if not det[worst] > 0:
        points = np.concatenate([lattice.quadrature_points()[inside.ravel()], extra_points])
        where = points[worst] * units
        raise InvalidInput(
            f"these targets fold the prop through itself (near {where[0]:.3g}, {where[1]:.3g}, {where[2]:.3g} in the "
            "object's units, from its centre): move the targets less far, or hold the part between them with another handle"
        )
    return float(det[worst])


def _turn_degrees(transform: np.ndarray | None) -> float:
    if transform is None:
        return 0.0
    lin = transform[:3, :3]
    u, _, vt = np.linalg.svd(lin)
    r = u @ vt
    return float(np.degrees(np.arccos(np.clip((np.trace(r) - 1.0) / 2.0, -1.0, 1.0))))


# ------------------------------------------------------------------------- the task


def run(field, mesh_unit: TriangleMesh, config: Config, progress=no_progress, should_stop=never_stop) -> TaskResult:
    """Deform: field f and mesh in unit-box coordinates -> TaskResult (unit box).

    result.mesh : the input's vertices moved (keep_topology, and always for a sheet) or a new
    watertight mesh, with vertex_values "stretch" and "bend"; result.rest_points : each result
    vertex's point in the input; result.field : None (a later edit refits the result).
    Raises InvalidInput when a handle is far from the surface or the targets fold the prop,
    Cancelled on should_stop().
    """
    seconds: dict[str, float] = {}
    t0 = time.perf_counter()
    diagonal = measures.bbox_diagonal(mesh_unit.vertices)
    groups = config.groups
    all_points = np.concatenate([g.points for g in groups])
    all_targets = np.concatenate([g.targets for g in groups])
    reach = float(np.linalg.norm(all_targets - all_points, axis=1).max())
    if reach > 2.0 * diagonal:
        raise InvalidInput(
            f"a target is {reach / diagonal:.1f} bounding-box diagonals from its handle: move handles at most about one "
            "object size per edit (apply several edits for larger moves)"
        )
    lo, hi = mesh_unit.vertices.min(axis=0), mesh_unit.vertices.max(axis=0)
    progress("lattice", 0.0, {})
    solid = choose_solid(field, mesh_unit, config, lo, hi)
    check_on_surface(field_values(field, all_points), SURFACE_TOLERANCE_REL * diagonal, config.units_per_length)
    check_stop(should_stop, "lattice")
    levels = _levels(solid, lo, hi, config, should_stop)
    lattice = levels[-1]
    constraints = build_constraints(groups, lattice, config)
    rot, shift, residual = rigid_fit(constraints.points, constraints.targets)
    tolerance = config.handle_tolerance_rel * diagonal
    rigid = residual <= 0.01 * tolerance  # one rigid motion of every handle: that motion is the answer
    if rigid:
        levels = levels[-1:]
    seconds["lattice"] = time.perf_counter() - t0
    progress("lattice", 1.0, {"cells": lattice.n_cells, "controls": lattice.n_dofs})

    t = time.perf_counter()
    settings = SolveSettings(max_iterations=config.max_iterations, energy_rel=config.solve.energy_rel,
                             move_rel=config.solve.move_rel, history=config.solve.history)
    start = None  # as the reference does, from the rest pose...
    for level, lat in enumerate(levels):
        cons = constraints if lat is lattice else build_constraints(groups, lat, config)
        carried = lat.rest @ rot.T + shift  # the prop moved by the handles' best rigid motion
        system = ElasticSystem(lat, cons, config.material.volume_weight, tether_to=carried)
        if rigid:
            start = carried
        elif level > 0:
            start = levels[level - 1].map(solution.control, lat.rest)  # ...or from the coarser answer
        solution = system.solve(start, settings, progress if lat is lattice else no_progress, should_stop)
    seconds["factor"] = system.seconds["factor"]
    handle_err = system.handle_errors(solution.control, constraints)
    seconds["solve"] = time.perf_counter() - t
    metrics_levels = len(levels)

    t = time.perf_counter()
    check_stop(should_stop, "transport")
    keep = config.keep_topology or solid.sheet
    if keep:
        rest = mesh_unit.vertices
        faces = mesh_unit.faces
    else:
        from ..extract import bounds_of, extract_mesh

        box_lo, box_hi = bounds_of(mesh_unit.vertices, margin=0.03)
        extracted = extract_mesh(field, box_lo, box_hi, config.resolution, progress, should_stop)
        rest, faces = extracted.vertices, extracted.faces
        seconds["extract"] = time.perf_counter() - t
        t = time.perf_counter()
    progress("transport", 0.0, {"vertices": len(rest)})
    moved, jacobians = lattice.map_and_jacobian(solution.control, rest)
    det_min = _fold_check(lattice, solution.control, rest, config.units_per_length, jacobians)
    stretch, bend = vertex_distortion(rest, moved, faces, diagonal)
    if keep:
        out = mesh_unit.with_vertices(moved, stretch=stretch, bend=bend)
    else:
        out = TriangleMesh(moved, faces, {"stretch": stretch, "bend": bend})
    seconds["transport"] = time.perf_counter() - t

    vol_in = measures.signed_volume(rest, faces)
    vol_out = measures.signed_volume(moved, faces)
    metrics: dict[str, float] = {
        "handle_error_max": float(handle_err.max()) if len(handle_err) else 0.0,
        "handle_error_mean": float(handle_err.mean()) if len(handle_err) else 0.0,
        "iterations": float(solution.iterations),
        "converged": float(solution.converged),
        "energy_change_rel": float(solution.energy_change_rel),
        "lattice_cells": float(lattice.n_cells),
        "lattice_controls": float(lattice.n_dofs),
        "lattice_cell_length": float(lattice.cell),
        "lattice_levels": float(metrics_levels),
        "handle_points_used": float(len(constraints.points)),
        "handle_groups": float(len(groups)),
        "turned_max_deg": max(_turn_degrees(g.transform) for g in groups),
        "volume_weight": float(config.material.volume_weight),
        "sheet": float(solid.sheet),
        "det_min": det_min,
        "stretch_mean": float(stretch.mean()) if len(stretch) else 0.0,
        "bend_mean": float(bend.mean()) if len(bend) else 0.0,
    }
    metrics["handle_error_max_rel"] = metrics["handle_error_max"] / diagonal
    metrics["within_tolerance"] = float(metrics["handle_error_max"] <= tolerance)
    if abs(vol_in) > 1e-12:
        metrics["volume_change_rel"] = float(vol_out / vol_in - 1.0)
    if keep:
        metrics["flipped_faces"] = float(flipped_faces(rest, moved, faces).sum())
    seconds["total"] = time.perf_counter() - t0
    progress("done", 1.0, {"handle_err": metrics["handle_error_max_rel"]})
    return TaskResult(out, None, metrics, seconds, rest_points=np.asarray(rest, dtype=np.float64).copy())


def summary_line(metrics: dict) -> str | None:
    """One line for the artist when the solve stopped early or the handles are off, else None."""
    if metrics.get("converged", 1.0) and metrics.get("within_tolerance", 1.0):
        return None
    off = metrics.get("handle_error_max_rel", float("nan"))
    if not metrics.get("converged", 1.0):
        return (f"the deformation stopped after {int(metrics.get('iterations', 0))} iterations before settling; "
                f"the handles are within {off:.2%} of the diagonal of their targets")
    return f"the handles ended {off:.2%} of the diagonal from their targets: the targets may ask more than the prop can give"
