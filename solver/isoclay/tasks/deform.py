"""Elastic deformation through the field: handles go to their targets, the rest follows like a thin shell.

The result field is g(x) = f(d(x)), d an invertible residual warp (isoclay.warp) from
deformed space back to the input. d minimises, over near-uniform samples p of the input
surface carried to y = d^-1(p),
    E = mean ||G - I||^2                      stretch (energies.stretch)
      + h^2 mean ||S_after - S_before||^2     bend (energies.bend), h = shell thickness
      + w_v mean (log det J_d)^2              local volume (energies.volume)
      + w_h mean |d(target) - handle|^2       handles (energies.handles)
like an elastic shell of thickness h (Koiter's shell model: membrane energy ~ h, bending
~ h^3, so bending weighs h^2 relative to stretch; Ciarlet 2005, "An introduction to
differential geometry with applications to elasticity", from memory).
The handles are constraints held by springs of fixed weight plus multipliers (augmented
Lagrangian), minimised by L-BFGS with a line search (Nocedal & Wright 2006, ch. 7 and 17).
Speed comes from what stays fixed: the samples p and f's gradient and Hessian there are
computed once (f is never evaluated in the loop); the warp's Jacobian and Hessian come from
one forward jet pass (warp.jets); y is tracked by warm-started fixed-point iterations.

Output: the original vertices carried by d^-1 (keep_topology) or a new watertight mesh of
g = 0, with per-vertex "stretch" and "bend" (energies.stretch.stretch_value and the RMS
principal-curvature change times the bounding-box diagonal, both dimensionless).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np
import torch

from ..energies.bend import bend_density, shape_operator_deformed, shape_operator_input
from ..energies.handles import handle_energy, handle_errors
from ..energies.mesh_distortion import flipped_faces
from ..energies.stretch import pushforward, stretch_density, stretch_value, tangent_frames, tangent_metric
from ..energies.volume import volume_density
from ..errors import InvalidInput, SolverFailure
from ..geometry.derivatives import as_points, hessian
from ..geometry.derivatives import values as field_values
from ..geometry.sampling import sample_level_set
from ..mesh import measures
from ..mesh.types import TriangleMesh
from ..warp import ResidualWarp, WarpConfig, WarpedSDF, symmetric_from_pairs
from .base import TaskResult, check_stop, is_finite_number, never_stop, no_progress
from .handles import SURFACE_TOLERANCE_REL, parse_handles, check_on_surface

#: Stiffness names an artist picks from, and the shell thickness behind each, as a fraction
#: of the object's longest side. A thin shell bends easily and keeps the bend local (rubber);
#: a thick one spreads the bend along the part and keeps its cross-sections (stiff).
STIFFNESS = {"rubber": 0.005, "soft": 0.01, "medium": 0.02, "firm": 0.05, "stiff": 0.1}
DEFAULT_STIFFNESS = "medium"

_KNOWN_PARAMS = {"handles", "targets", "stiffness", "keep_topology", "resolution", "seed"}


def stiffness_thickness(value) -> float:
    """A stiffness name (see STIFFNESS) or a positive number (thickness, fraction of the longest side)."""
    if isinstance(value, str):
        key = value.strip().lower()
        if key in STIFFNESS:
            return STIFFNESS[key]
        try:
            value = float(key)
        except ValueError:
            raise InvalidInput(
                f"unknown stiffness {value!r}: use one of {', '.join(STIFFNESS)} or a number from 0.001 to 1"
            ) from None
    if not is_finite_number(value) or not 0.001 <= value <= 1.0:
        raise InvalidInput(f"stiffness {value!r} is out of range: use one of {', '.join(STIFFNESS)} or a number from 0.001 to 1")
    return float(value)


@dataclass(frozen=True)
class Config:
    """Settings of one deformation, in unit-box coordinates (see mesh.Normalization).

    handles, targets : ((x, y, z), ...) handle points on the surface and where each must go
    thickness : shell thickness (unit-box lengths) behind the stiffness setting
    keep_topology : return the input's faces with moved vertices instead of a new mesh
    samples : surface samples the energies are averaged over each step
    handle_weight : weight of the handle springs (fixed with multipliers; else the starting
        weight, multiplied by handle_weight_growth each time the energy settles with the
        handles still off target, up to handle_weight_max)
    multipliers, multiplier_every, multiplier_threshold : method of multipliers on the handle
        constraints: when the energy has settled (or multiplier_every steps after the last
        update) with a handle further than multiplier_threshold x the tolerance from its target,
        each spring's rest point is moved by the remaining violation
    volume_weight : weight of the local volume term
    optimizer : "lbfgs" (default: the energy is deterministic on fixed samples, and L-BFGS with
        a strong-Wolfe line search converges where Adam's normalised steps let the stiff
        springs drown the elastic energy: bar bend mean stretch 0.093 -> 0.038, measured) or
        "adam"
    lbfgs_iterations, lbfgs_history : L-BFGS iterations per step and curvature pairs kept
    learning_rate, learning_rate_decay : Adam only; the rate decays exponentially to
        learning_rate_decay x its start by max_steps
    max_steps, min_steps : step limits (one step = lbfgs_iterations L-BFGS iterations or one
        Adam step)
    check_every : steps between handle-error checks and progress reports
    handle_tolerance_rel : stop once every handle is this close to its target (fraction of
        the bounding-box diagonal) and the energy has settled
    settle_window, settle_rel, settle_abs : the energy has settled when it fell by less than
        settle_rel (relative) plus settle_abs (absolute) over the last settle_window steps
    resolution : remeshing resolution (cells along the longest side) without keep_topology
    warp : shape of the warp
    seed : random seed (samples, warp initialisation)
    units_per_length : world units per unit-box length (messages only)
    """

    handles: tuple[tuple[float, float, float], ...]
    targets: tuple[tuple[float, float, float], ...]
    thickness: float = STIFFNESS[DEFAULT_STIFFNESS]
    keep_topology: bool = False
    samples: int = 384
    handle_weight: float = 1e4
    handle_weight_growth: float = 1.05
    handle_weight_max: float = 1e7
    multipliers: bool = True
    multiplier_every: int = 30
    multiplier_threshold: float = 1.0
    optimizer: str = "lbfgs"
    lbfgs_iterations: int = 5
    lbfgs_history: int = 20
    check_every: int = 1
    volume_weight: float = 0.1
    learning_rate: float = 3e-3
    learning_rate_decay: float = 0.1
    max_steps: int = 150
    min_steps: int = 10
    handle_tolerance_rel: float = 4e-3
    settle_window: int = 10
    settle_rel: float = 5e-2
    settle_abs: float = 1e-4
    resolution: int = 160
    warp: WarpConfig = field(default_factory=WarpConfig)
    seed: int = 0
    units_per_length: float = 1.0

    @classmethod
    def from_params(cls, params: dict, normalization) -> "Config":
        """Build from JSON-like params in world units: {"handles", "targets", "stiffness",
        "keep_topology", "resolution", "seed"}; raises InvalidInput with one line on bad input."""
        if not isinstance(params, dict):
            raise InvalidInput("deform settings must be an object with \"handles\" and \"targets\"")
        unknown = sorted(set(params) - _KNOWN_PARAMS)
        if unknown:
            raise InvalidInput(f"unknown deform setting {unknown[0]!r}: known settings are {', '.join(sorted(_KNOWN_PARAMS))}")
        hs = parse_handles(params)
        keep = params.get("keep_topology", False)
        if not isinstance(keep, bool):
            raise InvalidInput(f"keep_topology must be true or false, found {keep!r}")
        extra = {}
        if "resolution" in params:
            r = params["resolution"]
            if isinstance(r, bool) or not isinstance(r, int) or not 16 <= r <= 1024:
                raise InvalidInput(f"resolution {r!r} is out of range: use a whole number from 16 to 1024")
            extra["resolution"] = r
        if "seed" in params:
            s = params["seed"]
            if isinstance(s, bool) or not isinstance(s, int):
                raise InvalidInput(f"seed must be a whole number, found {s!r}")
            extra["seed"] = s
        thickness = stiffness_thickness(params.get("stiffness", DEFAULT_STIFFNESS))
        to_unit = normalization.to_unit
        return cls(
            handles=tuple(map(tuple, to_unit(hs.handles).tolist())),
            targets=tuple(map(tuple, to_unit(hs.targets).tolist())),
            thickness=thickness,
            keep_topology=keep,
            units_per_length=1.0 / float(normalization.scale),
            **extra,
        )


@dataclass
class _Surface:
    """Fixed per-sample data on the input surface (torch float32)."""

    points: torch.Tensor  # p (n, 3)
    grad: torch.Tensor  # grad f(p) (n, 3)
    hess: torch.Tensor  # Hessian f(p) (n, 3, 3)
    frames: torch.Tensor  # tangent frames (n, 3, 2)
    shape_before: torch.Tensor  # S_before (n, 2, 2)


def _surface_data(field, points: torch.Tensor, chunk: int = 32768) -> _Surface:
    grads, hesses = [], []
    for start in range(0, len(points), chunk):
        _, g, h = hessian(field, points[start : start + chunk])
        grads.append(g)
        hesses.append(h)
    grad = torch.cat(grads) if grads else torch.zeros(0, 3)
    hess = torch.cat(hesses) if hesses else torch.zeros(0, 3, 3)
    normals = grad / grad.norm(dim=1, keepdim=True).clamp(min=1e-12)
    frames = tangent_frames(normals)
    return _Surface(points, grad, hess, frames, shape_operator_input(grad, hess, frames))


@dataclass
class _Parts:
    stretch: torch.Tensor
    bend: torch.Tensor
    volume: torch.Tensor
    metric: torch.Tensor
    shape_after: torch.Tensor


def _energy_parts(warp: ResidualWarp, surface: _Surface, y: torch.Tensor, with_bend: bool = True) -> _Parts:
    """Per-sample stretch, bend (1/length^2) and volume densities of warp at y = d^-1(p)."""
    jet = warp.jet(y, order=2 if with_bend else 1)
    jac = jet.d1.transpose(1, 2)
    pushed = pushforward(jac, surface.frames)
    metric = tangent_metric(pushed)
    stretch = stretch_density(metric)
    if with_bend:
        q = symmetric_from_pairs((jet.d2 * surface.grad[:, None, :]).sum(-1))
        after = shape_operator_deformed(jac, q, surface.grad, surface.hess, surface.frames, pushed, metric)
        bend = bend_density(surface.shape_before, after)
    else:
        after = surface.shape_before
        bend = torch.zeros_like(stretch)
    return _Parts(stretch, bend, volume_density(jac), metric, after)


def _random_surface_points(mesh: TriangleMesh, count: int, rng: np.random.Generator) -> np.ndarray:
    """(count, 3) area-weighted random points on the mesh's triangles (seeds for the level-set sampler)."""
    v, f = mesh.vertices, mesh.faces
    area = measures.face_areas(v, f)
    face = rng.choice(len(f), size=count, p=area / area.sum())
    r1, r2 = rng.random(count), rng.random(count)
    s = np.sqrt(r1)
    a, b, c = v[f[face, 0]], v[f[face, 1]], v[f[face, 2]]
    return (1 - s)[:, None] * a + (s * (1 - r2))[:, None] * b + (s * r2)[:, None] * c


def sample_surface(field, mesh: TriangleMesh, count: int, rng: np.random.Generator) -> np.ndarray:
    """About ``count`` near-uniform points on f = 0, grown from the mesh (geometry.sample_level_set)."""
    seeds = _random_surface_points(mesh, 4 * count, rng)
    sample = sample_level_set(field, seeds, count, rng)
    if len(sample.points) < min(count // 4, 64):
        raise SolverFailure(
            f"only {len(sample.points)} surface samples landed on the field's zero level set; "
            "refit the field (it does not match the mesh)"
        )
    return sample.points


def vertex_distortion(field, warp: ResidualWarp, deformed: np.ndarray, original: np.ndarray, diagonal: float, chunk: int = 32768):
    """Per-vertex (stretch, bend) (n,) float32 at deformed points y whose input-space points are original = d(y)."""
    stretch = np.zeros(len(deformed), dtype=np.float32)
    bend = np.zeros(len(deformed), dtype=np.float32)
    for start in range(0, len(deformed), chunk):
        p = as_points(original[start : start + chunk])
        y = as_points(deformed[start : start + chunk])
        surface = _surface_data(field, p)
        with torch.no_grad():
            parts = _energy_parts(warp, surface, y)
        stretch[start : start + chunk] = stretch_value(parts.metric).numpy()
        bend[start : start + chunk] = (torch.sqrt(parts.bend / 2.0) * diagonal).numpy()
    return np.nan_to_num(stretch), np.nan_to_num(bend)


def rigid_fit(handles: np.ndarray, targets: np.ndarray):
    """Best rigid motion targets ~ R handles + t (Kabsch 1976): (rotation vector (3,), t (3,), max residual).

    With fewer than three handles, or collinear ones, the rotation is left out (pure translation).
    """
    from scipy.spatial.transform import Rotation

    ch, ct = handles.mean(axis=0), targets.mean(axis=0)
    a, b = handles - ch, targets - ct
    rotvec = np.zeros(3)
    rot = np.eye(3)
    if len(handles) >= 3 and np.linalg.svd(a, compute_uv=False)[1] > 1e-6:
        u, _, vt = np.linalg.svd(a.T @ b)
        d = np.sign(np.linalg.det(vt.T @ u.T)) or 1.0
        rot = vt.T @ np.diag([1.0, 1.0, d]) @ u.T
        rotvec = Rotation.from_matrix(rot).as_rotvec()
    t = ct - rot @ ch
    residual = float(np.linalg.norm(handles @ rot.T + t - targets, axis=1).max())
    return rotvec, t, residual


@dataclass(frozen=True)
class Optimised:
    """What the optimisation produced: the warp, steps taken, whether it settled, energy history."""

    warp: ResidualWarp
    steps: int
    converged: bool
    handle_error_max: float
    energies: dict
    handle_weight: float


def optimise_warp(
    field, surface_points: np.ndarray, config: Config, diagonal: float, progress=no_progress, should_stop=never_stop
) -> Optimised:
    """Fit the warp d to the handles under the shell energy (see module docstring)."""
    torch.manual_seed(config.seed)
    torch.set_flush_denormal(True)  # Adam moments decay into denormals otherwise (FACTS)
    warp = ResidualWarp(config.warp, seed=config.seed)
    surface = _surface_data(field, as_points(surface_points))
    handles = torch.tensor(config.handles, dtype=torch.float32).reshape(-1, 3)
    targets = torch.tensor(config.targets, dtype=torch.float32).reshape(-1, 3)
    tolerance = config.handle_tolerance_rel * diagonal
    if float((targets - handles).norm(dim=1).max()) <= 0.1 * tolerance:
        return Optimised(warp, 0, True, float((targets - handles).norm(dim=1).max()), {}, config.handle_weight)

    if config.warp.rigid:
        # handles that all move by one rigid motion (within tolerance): start there, so a
        # rigid edit costs nothing and a nearly rigid one starts close
        rotvec, shift, residual = rigid_fit(np.asarray(config.handles), np.asarray(config.targets))
        if residual <= tolerance:
            warp.set_rigid(rotvec, shift)
    thick2 = config.thickness**2
    with torch.no_grad():
        start = warp.inverse(surface.points, tolerance=2e-6)
        parts = _energy_parts(warp, surface, start.points)
        elastic0 = float(parts.stretch.mean() + parts.bend.mean() * thick2 + parts.volume.mean() * config.volume_weight)
        error0 = float(handle_errors(warp.inverse(handles, tolerance=1e-6).points, targets).max())
    if error0 <= tolerance and elastic0 <= config.settle_abs:
        # already there (a rigid edit): the optimiser's first steps would only add noise
        return Optimised(warp, 0, True, error0, {"stretch": float(parts.stretch.mean()), "bend": float(parts.bend.mean() * thick2)}, config.handle_weight)
    weight = config.handle_weight
    state: dict = {"warm": None}
    shift = torch.zeros_like(handles)  # scaled multipliers of the handle constraints (augmented Lagrangian)

    def closure():
        inv = warp.inverse(surface.points, warm=state["warm"], tolerance=2e-6)
        state["warm"] = inv.stages
        # y = d^-1(p) is held fixed within an evaluation (its own dependence on the warp left
        # out of the gradient: measured, the implicit-function term changed nothing on the bar bend)
        parts = _energy_parts(warp, surface, inv.points)
        terms = {
            "stretch": parts.stretch.mean(),
            "bend": parts.bend.mean() * thick2,
            "volume": parts.volume.mean() * config.volume_weight,
            "handle": handle_energy(warp(targets), handles - shift) / diagonal**2,
        }
        total = terms["stretch"] + terms["bend"] + terms["volume"] + weight * terms["handle"]
        optimizer.zero_grad(set_to_none=True)
        total.backward()
        state["terms"], state["total"] = terms, float(total.detach())
        return total

    def new_optimizer():
        if config.optimizer == "lbfgs":
            return torch.optim.LBFGS(
                warp.parameters(), lr=1.0, max_iter=config.lbfgs_iterations, history_size=config.lbfgs_history,
                tolerance_grad=0.0, tolerance_change=0.0, line_search_fn="strong_wolfe",
            )
        if config.optimizer == "adam":
            return torch.optim.Adam(warp.parameters(), lr=config.learning_rate)
        raise ValueError(f"unknown optimizer {config.optimizer!r}")

    optimizer = new_optimizer()
    history: list[float] = []
    parts_last: dict = {}
    error = float("inf")
    converged = False
    changed = 0  # last step at which the objective itself changed (multipliers, spring weight)
    best = (float("inf"), None, {})  # (handle error, warp state, energy parts) of the closest iterate
    step = 0
    for step in range(1, config.max_steps + 1):
        check_stop(should_stop, "deformation")
        if config.optimizer == "adam":
            for group in optimizer.param_groups:
                group["lr"] = config.learning_rate * config.learning_rate_decay ** (step / config.max_steps)
        optimizer.step(closure)
        history.append(state["total"])
        if step % config.check_every and step != config.max_steps:
            continue
        error = float(handle_errors(warp.inverse(handles, tolerance=1e-6).points, targets).max())
        parts_last = {k: float(v.detach()) for k, v in state["terms"].items()}
        if not all(math.isfinite(v) for v in parts_last.values()):
            raise SolverFailure("the deformation diverged (non-finite energy); try a stiffer setting or smaller moves")
        progress(
            "deform",
            step / config.max_steps,
            {"step": step, "energy": state["total"], "handle_err": error / diagonal, **{k: v for k, v in parts_last.items() if k != "handle"}},
        )
        if error < best[0]:
            best = (error, {k: v.detach().clone() for k, v in warp.state_dict().items()}, parts_last)
        window = config.settle_window
        settled = step - changed > window and (
            history[-window - 1] - history[-1] <= config.settle_rel * abs(history[-window - 1]) + config.settle_abs
        )
        if step >= config.min_steps and error <= tolerance and settled:
            converged = True
            break
        if step >= config.min_steps and error > config.multiplier_threshold * tolerance and (settled or step - changed >= config.multiplier_every):
            if config.multipliers:
                # method of multipliers (Hestenes 1969; Nocedal & Wright 2006, sec. 17.3): move each
                # spring's rest point by the constraint violation, so the handles reach their targets
                # at a fixed spring weight (a stiffer and stiffer spring would make the problem
                # ill-conditioned: the elastic energy stops being minimised)
                with torch.no_grad():
                    shift += warp(targets) - handles
            else:
                weight = min(weight * config.handle_weight_growth, config.handle_weight_max)
            changed = step
            if config.optimizer == "lbfgs":
                optimizer = new_optimizer()  # its curvature pairs straddle the change of objective
    if not converged and best[1] is not None and best[0] < error:
        # out of steps: hand back the iterate whose handles came closest (the multiplier updates
        # make the last one swing around it), not merely the last
        warp.load_state_dict(best[1])
        error, parts_last = best[0], best[2]
    return Optimised(warp, step, converged, error, parts_last, weight)


def run(field, mesh_unit: TriangleMesh, config: Config, progress=no_progress, should_stop=never_stop) -> TaskResult:
    """Deform: field f and mesh in unit-box coordinates -> TaskResult (unit box).

    result.mesh : transported input (keep_topology) or a new watertight mesh, with
        vertex_values "stretch" and "bend"; result.field : WarpedSDF g = f o d.
    Raises InvalidInput when a handle is far from the surface, SolverFailure when the warp
    cannot be inverted, Cancelled on should_stop().
    """
    seconds: dict[str, float] = {}
    t0 = time.perf_counter()
    rng = np.random.default_rng(config.seed)
    diagonal = measures.bbox_diagonal(mesh_unit.vertices)
    handles = np.asarray(config.handles, dtype=np.float64).reshape(-1, 3)
    targets = np.asarray(config.targets, dtype=np.float64).reshape(-1, 3)
    if len(handles) == 0 or len(handles) != len(targets):
        raise InvalidInput(f"{len(handles)} handles but {len(targets)} targets: give exactly one target per handle")
    if not (np.isfinite(handles).all() and np.isfinite(targets).all()):
        raise InvalidInput("a handle or target has a NaN or infinite coordinate: give finite numbers")
    check_on_surface(field_values(field, handles), SURFACE_TOLERANCE_REL * diagonal, config.units_per_length)
    reach = np.linalg.norm(targets - handles, axis=1).max()
    if reach > 2.0 * diagonal:
        raise InvalidInput(
            f"a target is {reach / diagonal:.1f} bounding-box diagonals from its handle: move handles at most about one "
            "object size per edit (apply several edits for larger moves)"
        )

    progress("sample", 0.0, {})
    points = sample_surface(field, mesh_unit, config.samples, rng)
    seconds["sample"] = time.perf_counter() - t0

    t = time.perf_counter()
    opt = optimise_warp(field, points, config, diagonal, progress, should_stop)
    seconds["optimise"] = time.perf_counter() - t
    warp = opt.warp
    for p in warp.parameters():
        p.requires_grad_(False)
    result_field = WarpedSDF(field, warp)

    t = time.perf_counter()
    check_stop(should_stop, "transport")
    progress("transport", 0.0, {"vertices": mesh_unit.n_vertices})
    moved = warp.inverse(as_points(mesh_unit.vertices)).points.double().numpy()
    handle_after = warp.inverse(as_points(handles)).points.double().numpy()
    handle_err = np.linalg.norm(handle_after - targets, axis=1)
    seconds["transport"] = time.perf_counter() - t

    metrics: dict[str, float] = {
        "handle_error_max": float(handle_err.max()),
        "handle_error_max_rel": float(handle_err.max() / diagonal),
        "steps": float(opt.steps),
        "converged": float(opt.converged),
        "handle_weight": float(opt.handle_weight),
        "thickness": float(config.thickness),
        "samples": float(len(points)),
    }
    metrics.update({f"energy_{k}": v for k, v in opt.energies.items()})
    vol_in = measures.signed_volume(mesh_unit.vertices, mesh_unit.faces)

    t = time.perf_counter()
    if config.keep_topology:
        check_stop(should_stop, "measure")
        stretch, bend = vertex_distortion(field, warp, moved, mesh_unit.vertices, diagonal)
        out = mesh_unit.with_vertices(moved, stretch=stretch, bend=bend)
        metrics["flipped_faces"] = float(flipped_faces(mesh_unit.vertices, moved, mesh_unit.faces).sum())
    else:
        from ..extract import bounds_of, extract_mesh

        check_stop(should_stop, "extract")
        lo, hi = bounds_of(moved, margin=0.03)  # the deformed input bounds the new surface
        new = extract_mesh(result_field, lo, hi, config.resolution, progress, should_stop)
        seconds["extract"] = time.perf_counter() - t
        t = time.perf_counter()
        with torch.no_grad():
            original = warp(as_points(new.vertices)).double().numpy()
        stretch, bend = vertex_distortion(field, warp, new.vertices, original, diagonal)
        out = new.with_vertices(new.vertices, stretch=stretch, bend=bend)
    seconds["measure"] = time.perf_counter() - t
    vol_out = measures.signed_volume(out.vertices, out.faces)
    if abs(vol_in) > 1e-12:
        metrics["volume_change_rel"] = float(vol_out / vol_in - 1.0)
    metrics["stretch_mean"] = float(np.mean(out.vertex_values["stretch"])) if out.n_vertices else 0.0
    metrics["bend_mean"] = float(np.mean(out.vertex_values["bend"])) if out.n_vertices else 0.0
    seconds["total"] = time.perf_counter() - t0
    progress("done", 1.0, {"handle_err": metrics["handle_error_max_rel"]})
    return TaskResult(out, result_field, metrics, seconds)
