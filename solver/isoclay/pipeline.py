"""One edit from start to finish: validate, normalise, fit (or reuse) a field, run the task, map back.

The command line and the service's workers both call run_edit; nothing here knows about
sockets or terminals.
"""

from __future__ import annotations

import hashlib
import json
import time
from dataclasses import dataclass, field as dc_field, replace
from typing import TYPE_CHECKING

import numpy as np

from .field.fit import FitConfig, fit_field
from .mesh import measures
from .mesh.correspondence import SurfaceCorrespondence, closest_surface_points, identity_correspondence, usable_faces
from .mesh.normalize import Normalization
from .mesh.types import TriangleMesh
from .mesh.validate import MeshCheck, validate_mesh
from .callbacks import never_stop, no_progress
from .tasks.registry import task_module

if TYPE_CHECKING:
    from .field.base import SDFField

#: Metrics that tasks report as unit-box lengths; the report converts them to the mesh's units
#: and adds a twin ending in "_rel" (fraction of the bounding-box diagonal). Any metric whose
#: name ends in "_length" is treated the same way.
LENGTH_METRICS = {"handle_error_max", "handle_error_mean", "moved_max", "moved_mean", "gap_max", "gap_mean", "crease_largest_move"}
#: Per-vertex values that tasks give in unit-box lengths; written in the mesh's units.
LENGTH_VERTEX_VALUES = {"moved"}


@dataclass(frozen=True)
class Prepared:
    """A validated input: world (as given), check (cleaned mesh + warnings), normalization,
    unit (cleaned mesh in the unit box), mesh_hash (64 hex)."""

    world: TriangleMesh
    check: MeshCheck
    normalization: Normalization
    unit: TriangleMesh
    mesh_hash: str


def mesh_hash(vertices: np.ndarray, faces: np.ndarray) -> str:
    """sha256 of the float64 vertices and int64 faces (C order): the mesh's content address."""
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(vertices, dtype="<f8").tobytes())
    h.update(b"|")
    h.update(np.ascontiguousarray(faces, dtype="<i8").tobytes())
    return h.hexdigest()


def fit_key(mesh_hash_hex: str, config: FitConfig) -> str:
    """Cache key of a fitted field: the mesh content and every fit setting."""
    text = json.dumps({"mesh": mesh_hash_hex, "fit": config.to_dict()}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()


def prepare_mesh(mesh: TriangleMesh, name: str = "mesh") -> Prepared:
    """Validate (InvalidMesh on unusable input) and normalise a mesh given in world units."""
    check = validate_mesh(mesh, name)
    used = measures.used_vertices(check.mesh.n_vertices, check.mesh.faces)
    normalization = Normalization.of(check.mesh.vertices[used])
    unit = normalization.mesh_to_unit(check.mesh)
    return Prepared(mesh, check, normalization, unit, mesh_hash(mesh.vertices, mesh.faces))


@dataclass(frozen=True)
class EditOutcome:
    """mesh : result in world units (vertex_values carried); field : the field the edit started
    from (None for a task that needs none, decimate); result_field : the edited field or None; report : JSON-ready summary.
    correspondence : for each result vertex its source point on the input mesh as given
    (face index into mesh.faces as sent, barycentric weights), see source_correspondence."""

    mesh: TriangleMesh
    field: SDFField | None
    result_field: SDFField | None
    normalization: Normalization
    mesh_hash: str
    fit_key: str
    metrics: dict
    seconds: dict
    warnings: tuple
    report: dict = dc_field(default_factory=dict)
    correspondence: SurfaceCorrespondence | None = None


def world_metrics(metrics: dict, normalization: Normalization, diagonal: float) -> dict:
    """Convert unit-box length metrics to world units, adding *_rel twins."""
    out = {}
    for key, value in metrics.items():
        value = float(value)
        if key in LENGTH_METRICS or key.endswith("_length"):
            world = normalization.length_from_unit(value)
            out[key] = world
            out[f"{key}_rel"] = world / diagonal if diagonal > 0 else float("nan")
        else:
            out[key] = value
    return out


def capped_fit_config(module, config, fit_config: FitConfig) -> FitConfig:
    """The fit a task needs: a task module's FIELD_RESOLUTION (cells, or absent) caps the field's
    resolution (smooth needs no field finer than its working grid: finer detail is what it removes)."""
    cap = getattr(module, "FIELD_RESOLUTION", None)
    if cap is None or fit_config.resolution <= cap:
        return fit_config
    return replace(fit_config, resolution=int(cap))


def fit_config_for(task: str, params: dict, normalization, fit_config: FitConfig) -> FitConfig:
    """capped_fit_config by task name and raw parameters (the service's cache asks before the edit)."""
    module = task_module(task)
    return capped_fit_config(module, module.Config.from_params(dict(params), normalization), fit_config)


def run_edit(
    mesh: TriangleMesh,
    task: str,
    params: dict,
    *,
    field: SDFField | None = None,
    fit_config: FitConfig | None = None,
    progress=no_progress,
    should_stop=never_stop,
    seed: int = 0,
    prepared: Prepared | None = None,
    correspondence: bool = True,
    plain_field: bool = False,
) -> EditOutcome:
    """Run one task on a world-units mesh. Parameters are checked before any fitting starts.

    correspondence : also map each result vertex to its source point on the input (what carries
        UVs and materials in Blender); callers that write plain mesh files skip it (13 s of a
        3.0M-face scan's rebuild).
    plain_field : a task that reads field values only (its module sets VALUES_ONLY: remesh) gets
        the fitted spline as a plain grid and torch is never imported (2.8 s and 220 MB of a
        command-line rebuild); outcome.field is then that grid. Callers that keep the field
        (the service's cache and history, batch) leave it False."""
    t0 = time.perf_counter()
    prepared = prepared or prepare_mesh(mesh)
    module = task_module(task)
    config = module.Config.from_params(dict(params), prepared.normalization)
    fit_config = fit_config or FitConfig(seed=seed)
    if field is None:
        fit_config = capped_fit_config(module, config, fit_config)
    seconds: dict = {"prepare": time.perf_counter() - t0}
    warnings = tuple(prepared.check.warnings)
    if field is None and getattr(module, "NEEDS_FIELD", True):
        modules = not (plain_field and getattr(module, "VALUES_ONLY", False))
        fitted = fit_field(prepared.unit, fit_config, progress, should_stop, np.random.default_rng(seed), modules=modules)
        field = fitted.field
        seconds["fit"] = fitted.seconds["total"]
        warnings += thin_warnings(fitted.thin, prepared.normalization, fit_config.resolution)
    result = module.run(field, prepared.unit, config, progress, should_stop)
    seconds.update({k: float(v) for k, v in result.seconds.items()})
    mapping = None
    if correspondence:
        t1 = time.perf_counter()
        progress("correspondence", 0.0, {})
        mapping = source_correspondence(prepared, result.mesh, result.rest_points)
        seconds["correspondence"] = time.perf_counter() - t1
    world = prepared.normalization.mesh_from_unit(result.mesh)
    for name in LENGTH_VERTEX_VALUES & set(world.vertex_values):
        world.vertex_values[name] = (world.vertex_values[name] / prepared.normalization.scale).astype(np.float32)
    seconds["total"] = time.perf_counter() - t0
    diagonal = measures.bbox_diagonal(prepared.check.mesh.vertices[measures.used_vertices(prepared.check.mesh.n_vertices, prepared.check.mesh.faces)])
    metrics = world_metrics(result.metrics, prepared.normalization, diagonal)
    report = {
        "task": task,
        "params": _jsonable(params),
        "seconds": seconds,
        "bbox_diagonal": diagonal,
        "vertices": world.n_vertices,
        "faces": world.n_faces,
        "watertight": measures.is_watertight(world.faces),
        "input": {"vertices": mesh.n_vertices, "faces": mesh.n_faces, "hash": prepared.mesh_hash},
        "warnings": list(warnings),
        "fit": fit_config.to_dict(),
        **metrics,
    }
    return EditOutcome(
        world, field, result.field, prepared.normalization, prepared.mesh_hash,
        fit_key(prepared.mesh_hash, fit_config), metrics, seconds, warnings, report, mapping,
    )


def source_correspondence(prepared: Prepared, result_unit: TriangleMesh, rest_points: np.ndarray | None) -> SurfaceCorrespondence:
    """Per result vertex, the face of the input mesh as sent (prepared.world, not the cleaned copy:
    the add-on indexes its own triangles) and barycentric weights there.

    A result that kept the input's vertices and faces maps each vertex to itself. Otherwise each
    vertex's source point is rest_points (unit box: a deform's pre-image through its own map) or,
    when None, the vertex itself (smooth, sharpen, remesh), projected to the closest point of the input.
    """
    given = prepared.world
    usable = usable_faces(given.vertices, given.faces)
    if result_unit.n_vertices == given.n_vertices and np.array_equal(result_unit.faces, prepared.unit.faces):
        return identity_correspondence(given.n_vertices, given.faces, usable)
    points = result_unit.vertices if rest_points is None else np.asarray(rest_points, dtype=np.float64)
    if points.shape != (result_unit.n_vertices, 3):
        raise ValueError(f"rest_points has shape {points.shape}, expected ({result_unit.n_vertices}, 3)")
    unit_input = prepared.normalization.to_unit(given.vertices)
    return closest_surface_points(points, unit_input, given.faces)


def thin_warnings(thin, normalization: Normalization, resolution: int) -> tuple[str, ...]:
    """One line per part the field cannot hold (field.thin), in the mesh's own units."""
    from .field.grids import DEFAULT_HALF_EXTENT

    cell = normalization.length_from_unit(2 * DEFAULT_HALF_EXTENT / resolution)
    out = []
    for part in thin:
        x, y, z = normalization.from_unit(np.asarray(part["center"])[None])[0]
        out.append(f"part {part['part'] + 1} is thinner than the field can hold near ({x:.4g}, {y:.4g}, {z:.4g}) "
                   f"({part['share']:.0%} of its surface, under about {cell:.3g} units thick): it may come back "
                   "thinner, with holes or missing; raise --field-resolution (up to 1024) or thicken it")
    return tuple(out)


def _jsonable(value):
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, (np.floating, np.integer)):
        return value.item()
    return value
