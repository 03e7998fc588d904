"""Smooth: remove bumps smaller than a given size from the fitted field, keeping creases and volume.

Method (measured in `isoclay bench`, section smooth): the field is read onto a working grid whose
cell is a quarter of the strength (so the cost is about the same at every strength), and its
node values are filtered in two rounds; each round computes feature-preserving target normals by
a joint bilateral filter at the requested scale, guided by the normals of a blurred copy
(energies.feature_normals), then runs the level-set flow toward them,
phi_t = |grad phi| (kappa - div N) (energies.curvature_flow; Tasdizen et al. 2002), with the mean
speed removed so the volume stays put. Noise has normals scattered at small scale and is
averaged away; a crease has two consistent families of normals and stays. The remeshed result
gets its creases back where the data shows flat sides meeting (creases "auto").
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from ..energies.curvature_flow import curvature_flow, enclosed_volume, narrow_band, spline_of, unit_box_grid
from ..energies.feature_normals import bilateral_normals
from ..errors import InvalidInput
from ..mesh.types import TriangleMesh
from .base import TaskResult, check_param_names, check_stop, face_normals
from .result_surface import (  # noqa: F401 (project_vertices, MAX_PROJECTION_MOVE: part of this task's interface)
    MAX_PROJECTION_MOVE,
    SurfaceOptions,
    optional_resolution,
    positive_length,
    project_vertices,
    require_bool,
    surface_of,
)
from .result_surface import shown as _shown

#: Largest strength accepted, as a fraction of the object's longest side: beyond it the whole
#: object is a "bump" and smoothing would melt it.
MAX_STRENGTH_REL = 0.25
#: Flow time per round (organic surfaces) in units of strength^2. What is left of ripples after
#: both rounds, by wavelength in strengths (a bump is half a wave; measured on a rippled slab of
#: amplitude 0.01 through smooth_grid): 2: 0, 3: 0.05, 4: 0.24, 6: 0.66. The issue's noisy sphere
#: (white noise at the vertex spacing, strength twice the spacing) asks for the residual <= 0.25
#: of the input's, which white noise allows only when little shorter than 3.7 strengths survives
#: (its 144 modes up to that wavelength alone hold 0.24 of it on the 2562-vertex sphere): at 0.25
#: (wavelength 4 kept 0.35) the sphere kept 0.21-0.24 over four noise seeds, at 0.4 with the
#: wider guide 0.19-0.22.
FLOW_TIME_PER_STRENGTH2 = 0.4
#: Working grid cell = strength / CELLS_PER_STRENGTH, within WORKING_RESOLUTION cells across the
#: unit box: 3 cells per strength resolves a bump of that size and keeps the filter at 3 passes
#: and the flow at 5 steps a round at any strength (4 cells: 5 passes, 9 steps, 2.4x the time for
#: the same residual on the noisy sphere, measured); 192 cells at most (7M nodes, the dense grid
#: two cores afford), 48 at least.
CELLS_PER_STRENGTH = 3.0
WORKING_RESOLUTION = (48, 192)
#: Finest field smoothing fits (cells along the longest side; the pipeline caps the fit to it): the
#: working grid has at most 192 cells, and detail finer than it is what the flow removes. Measured
#: on the bench's noisy 50k-vertex anvil at 1% of the diagonal: fit at 1024 cells 6.4 s, at 256
#: 2.0 s; Chamfer of the result to the clean anvil 2.56e-4 and 2.52e-4 of the diagonal, Hausdorff
#: 5.1e-3 and 4.7e-3; the noisy chamfered block (strength 0.03): feature-region normal error 4.5
#: deg at 1024, 4.5 at 128.
FIELD_RESOLUTION = 256
#: Spatial standard deviation of the normal filter, in strengths: a bump of the strength's size
#: (a half-wave) keeps exp(-2 pi^2 0.7^2 / 4) = 9% of its tilt, one twice that size 55%
#: (Gaussian attenuation; at 0.5 the noisy sphere kept 25% of its ripple, measured).
FILTER_SHARE = 0.7
#: The guide of the bilateral filter (organic surfaces) is blurred by this share of the strength
#: (2 cells at 3 cells per strength): noise gone, broad forms kept (0.5 left the noisy sphere
#: 0.01-0.02 more of its ripple, see FLOW_TIME_PER_STRENGTH2).
GUIDE_SHARE = 0.7
#: Crease treatments: "auto" decides from the data, "crisp" treats the shape as a hard surface
#: (creases restored wherever a rounded strip shows), "soft" as organic (never restored).
CREASE_MODES = ("auto", "crisp", "soft")
#: "auto": a shape is a hard surface when at least this share of its area is flat (radius of
#: curvature above the object's longest side, read across scales: energies.crease_sharpen.
#: flat_share, through a 4-cell blur). Measured: bench chamfered block with 0.3% noise 0.25, noisy
#: sphere 0.003, demo stone 0.08, demo clay anvil 0.007. A hard surface keeps the plain bilateral filter (its creases protect themselves,
#: feature-region normal error 13.9 against 17.9 deg with the guide) and the shorter flow, and
#: gets its creases restored; an organic one takes the guided filter (no orange peel: residual
#: ripple 0.27 against 0.31 of the input's without it) and the longer flow.
HARD_SURFACE_FLAT_SHARE = 0.15
#: Flow time per round for hard surfaces, in strength^2 (the earlier default: creases rounded less).
FLOW_TIME_HARD = 0.08


@dataclass(frozen=True)
class Config:
    """Smooth settings (unit-box lengths: the object's longest side is 1).

    strength : (0, MAX_STRENGTH_REL] unit box; bumps smaller than this disappear, larger forms stay
    creases : "auto" (default: creases between flat sides come back crisp, organic surfaces are
        left smooth), "crisp" (restore every rounded strip), "soft" (no restoration)
    preserve_volume : keep the enclosed volume (default) or let the flow shrink convex parts
    closed : an open scan comes back trimmed to its scanned footprint unless True
    keep_topology : move the input's own vertices onto the new surface instead of remeshing
    resolution : 16..1024 marching-cubes cells along the longest side, or None (follows the
        input's edge lengths and the working grid, then decimated toward the input's face count)
    rounds : filter-then-flow rounds (engine setting, 2)
    range_sigma : normal-similarity width of the bilateral filter (engine setting, 0.15)
    """

    strength: float
    creases: str = "auto"
    preserve_volume: bool = True
    closed: bool = False
    keep_topology: bool = False
    resolution: int | None = None
    rounds: int = 2
    range_sigma: float = 0.15

    KNOWN = ("strength", "creases", "crisp_creases", "preserve_volume", "closed", "keep_topology", "resolution")

    @classmethod
    def from_params(cls, params: dict, normalization=None) -> "Config":
        """params in the mesh's own units: strength (length), creases, preserve_volume, closed, keep_topology,
        resolution; the older crisp_creases (true = "crisp") is still accepted."""
        check_param_names("smooth", params, cls.KNOWN, '{"strength": 0.01}')
        if "strength" not in params:
            raise InvalidInput("smooth: strength is missing: give the size of the bumps to remove, in the mesh's units")
        s = positive_length("smooth", "strength", params["strength"], "size of the bumps to remove")
        unit = normalization.length_to_unit(s) if normalization is not None else s
        if unit > MAX_STRENGTH_REL:
            size = normalization.length_from_unit(1.0) if normalization is not None else 1.0
            raise InvalidInput(
                f"smooth: strength {_shown(s)} is too large for an object {size:.4g} long (at most {MAX_STRENGTH_REL * size:.4g}): "
                "give the size of the bumps to remove, not of the object"
            )
        creases = params.get("creases")
        crisp = params.get("crisp_creases")
        if crisp is not None:
            require_bool("smooth", "crisp_creases", crisp)
            if creases is not None and crisp and creases != "crisp":
                raise InvalidInput(f"smooth: crisp_creases true contradicts creases {creases!r}: give only creases")
        if creases is None:
            creases = "crisp" if crisp else "auto"
        if creases not in CREASE_MODES:
            shown = repr(creases) if isinstance(creases, str) and len(creases) < 20 else "given"
            raise InvalidInput(f"smooth: creases {shown} unknown: use auto, crisp or soft")
        return cls(
            strength=float(unit),
            creases=creases,
            preserve_volume=require_bool("smooth", "preserve_volume", params.get("preserve_volume", True)),
            closed=require_bool("smooth", "closed", params.get("closed", False)),
            keep_topology=require_bool("smooth", "keep_topology", params.get("keep_topology", False)),
            resolution=optional_resolution("smooth", params),
        )


def working_resolution(strength: float) -> int:
    """Cells across the unit box (plus margins) for a strength (unit box)."""
    lo, hi = WORKING_RESOLUTION
    return int(np.clip(round(CELLS_PER_STRENGTH / strength) + 16, lo, hi))


def hard_surface(grid, config: Config) -> bool:
    """Whether to treat the shape as a hard surface: from the creases setting, or ("auto") from
    the data (HARD_SURFACE_FLAT_SHARE)."""
    if config.creases != "auto":
        return config.creases == "crisp"
    from ..energies.crease_sharpen import flat_share

    return flat_share(grid) >= HARD_SURFACE_FLAT_SHARE


def smooth_grid(grid, config: Config, progress, should_stop, excluded=None, hard: bool = False) -> dict:
    """Run the rounds of filtering and flow on a NodeGrid in place; returns figures.

    excluded : (S^3,) bool or None, nodes that stay as they are (an open scan's cap)
    hard : hard-surface settings (plain bilateral filter, shorter flow) instead of organic ones
    """
    figures = {"passes": 0, "steps": 0}
    guide = 0.0 if hard else GUIDE_SHARE * config.strength / grid.cell
    flow_time = FLOW_TIME_HARD if hard else FLOW_TIME_PER_STRENGTH2
    for r in range(config.rounds):
        check_stop(should_stop, "smooth")
        target = bilateral_normals(grid, 2.0 * FILTER_SHARE * config.strength, config.range_sigma, should_stop=should_stop,
                                   guide_cells=guide, excluded=excluded)
        figures["passes"] += target.passes
        report = curvature_flow(
            grid,
            flow_time * config.strength**2,
            config.preserve_volume,
            target.normals,
            progress=lambda f, r=r: progress("smooth", (r + f) / config.rounds, {"round": r + 1}),
            should_stop=should_stop,
        )
        figures["steps"] += report.steps
    return figures


#: Band nodes over an open scan's cap: their distance to the scanned triangles exceeds their
#: field value by more than this many working cells. Held still and kept out of the normal
#: filter, they also hold the crease the fit leaves at the rim. Measured on the noisy sphere cut
#: at z = -0.25 (strength twice the spacing): mean normal error within 0.1 of the rim 9.3 deg at
#: 0.5 cell (4.6 x the interior's), 10.1 at 1 cell, 11.9 with the earlier test (nearest vertex,
#: two spacings), 10.3 at 0.1 cell (the fit's own error starts to count as cap); 9.8 (4.7 x)
#: with the flow's re-distancing at its 99% quantile (curvature_flow.REDISTANCE_QUANTILE).
CAP_MARGIN_CELLS = 0.5


@dataclass(frozen=True)
class Cap:
    """What a field puts across an open scan's holes, as band nodes, with what the test that found
    them learnt.

    mask : (S^3,) bool, the nodes over the cap itself: held still (kept out of the normal filter)
    index, distance, face, nearest : the nodes whose values are not the scan's own distance (those
        over the cap, and those whose nearest scanned point lies on a rim), each with its
        distance to the scanned triangles, its nearest triangle and nearest point
    """

    mask: np.ndarray
    index: np.ndarray
    distance: np.ndarray
    face: np.ndarray
    nearest: np.ndarray


def cap_nodes(grid, mesh: TriangleMesh) -> Cap | None:
    """The band nodes over the cap a field puts across an open scan's holes (their distance to the
    scanned triangles exceeds their distance to the level set by more than CAP_MARGIN_CELLS) and
    beside its rims (their nearest scanned point lies on a rim), or None for a closed scan."""
    import igl

    from ..extract.footprint import boundary_edge_count, on_rim

    if boundary_edge_count(mesh.faces) == 0:
        return None
    band = narrow_band(grid, 8.0)
    d2, face, nearest = igl.point_mesh_squared_distance(grid.positions(band.index), mesh.vertices, mesh.faces)
    distance = np.sqrt(d2)
    phi = np.abs(grid.values.reshape(-1)[band.index])
    on_cap = distance > phi + CAP_MARGIN_CELLS * grid.cell
    beyond = on_cap | on_rim(mesh, face, nearest)
    mask = np.zeros(grid.values.size, dtype=bool)
    mask[band.index[on_cap]] = True
    return Cap(mask, band.index[beyond], distance[beyond], face[beyond], nearest[beyond])


#: Over an open scan's cap and beside its rims, within this many strengths of the scanned
#: triangles, the fitted membrane is replaced by the scan continued along its own smoothed tangent
#: planes, blended linearly back to the membrane at this distance. The membrane meets the scan in
#: a bend that smoothing would spread into the kept surface; the continuation has none.
RIM_CONTINUATION_STRENGTHS = 3.0
#: The continued plane of a rim triangle: its normal is the area-weighted mean of the scanned
#: triangles' normals within PLANE_NORMAL_STRENGTHS strengths, and it passes through the mean
#: height (along that normal) of the triangles within PLANE_OFFSET_STRENGTHS: the noise of the
#: rim's own triangles (tilted by 15-20 deg at noise of a third of the spacing) is not continued.
#: Measured on the noisy sphere cut at z = -0.25 (strength twice the spacing), mean normal error
#: within 0.1 of the rim over the interior's, seeds 0-3: 4.7-5.9 x with the membrane left as the
#: fit made it; 2.0-2.7 x continuing the nearest triangle's plane over the cap nodes only; 1.8-2.2 x
#: over the rim's nodes as well (the membrane's corner at the rim had stayed); 1.3-1.7 x with
#: normals over 1 strength, 1.25-1.55 x over 2 (3: 1.2-1.5 x); 1.05-1.39 x with the plane through
#: the mean height over 1 strength (1.15-1.47 x over half). Blending over 2 strengths: 1.4-1.8 x
#: (normals over 1 strength), 4: the same as 3. Only for open results: closed=True keeps the
#: membrane it returns.
PLANE_NORMAL_STRENGTHS = 2.0
PLANE_OFFSET_STRENGTHS = 1.0
#: At most this many scanned triangles (a random share of a larger scan) lend their normals and
#: heights to the continued planes.
PLANE_SAMPLE_FACES = 200_000


def rim_planes(mesh: TriangleMesh, faces: np.ndarray, normals: np.ndarray, centres: np.ndarray, strength: float):
    """(points, normals) of the smoothed tangent planes of the given scanned triangles
    (PLANE_NORMAL_STRENGTHS, PLANE_OFFSET_STRENGTHS); `normals` and `centres` are all the scan's
    face normals (oriented outward) and centres."""
    from scipy.spatial import cKDTree

    from ..mesh.measures import face_areas

    area = face_areas(mesh.vertices, mesh.faces)
    lend = np.arange(len(centres))
    if len(lend) > PLANE_SAMPLE_FACES:
        lend = np.random.default_rng(0).choice(lend, PLANE_SAMPLE_FACES, replace=False)
    tree = cKDTree(centres[lend])
    out_n = np.empty((len(faces), 3))
    out_p = np.empty((len(faces), 3))
    wide = tree.query_ball_point(centres[faces], PLANE_NORMAL_STRENGTHS * strength)
    near = tree.query_ball_point(centres[faces], PLANE_OFFSET_STRENGTHS * strength)
    for k, (f, w_ids, n_ids) in enumerate(zip(faces, wide, near)):
        w_ids = lend[w_ids] if len(w_ids) else np.array([f])
        n_ids = lend[n_ids] if len(n_ids) else np.array([f])
        mean = (normals[w_ids] * area[w_ids, None]).sum(axis=0)
        norm = np.linalg.norm(mean)
        n = mean / norm if norm > 0 else normals[f]
        out_n[k] = n
        out_p[k] = centres[f] + ((centres[n_ids] - centres[f]) @ n).mean() * n
    return out_p, out_n


def continue_past_rim(grid, mesh: TriangleMesh, cap: Cap, strength: float) -> None:
    """Replace the values of the cap's and rims' nodes near the scan by its smoothed tangent-plane
    continuation, in place (see RIM_CONTINUATION_STRENGTHS). The triangles' winding is read
    against the field once for the whole scan (its value a cell and a half either side of every
    triangle's centre, by majority): a per-point test fails beside the rim, where the sign itself
    is in doubt."""
    from scipy.ndimage import map_coordinates

    if len(cap.index) == 0:
        return
    normals = face_normals(mesh.vertices, mesh.faces)
    centres = mesh.vertices[mesh.faces].mean(axis=1)
    h = 1.5 * grid.cell
    origin = grid.axis()[0]

    def value_at(points):
        return map_coordinates(grid.values, ((points - origin) / grid.cell).T, order=1, mode="nearest")

    if np.sum(np.sign(value_at(centres + h * normals) - value_at(centres - h * normals))) < 0:
        normals = -normals
    near = cap.distance < RIM_CONTINUATION_STRENGTHS * strength
    faces, which = np.unique(cap.face[near], return_inverse=True)
    points, plane_normals = rim_planes(mesh, faces, normals, centres, strength)
    index = cap.index[near]
    continued = ((grid.positions(index) - points[which]) * plane_normals[which]).sum(axis=1)
    weight = 1.0 - cap.distance[near] / (RIM_CONTINUATION_STRENGTHS * strength)
    flat = grid.values.reshape(-1)
    flat[index] = weight * continued + (1.0 - weight) * flat[index]


def run(field, mesh: TriangleMesh, config: Config, progress, should_stop) -> TaskResult:
    """Smooth the field and return the new field with a remeshed or vertex-projected surface (unit box)."""
    t0 = time.perf_counter()
    grid = unit_box_grid(field, working_resolution(config.strength))
    cap = cap_nodes(grid, mesh)
    if cap is not None and not config.closed:
        continue_past_rim(grid, mesh, cap, config.strength)
    excluded = None if cap is None else cap.mask
    volume_before = enclosed_volume(grid)
    hard = hard_surface(grid, config)
    figures = smooth_grid(grid, config, progress, should_stop, excluded, hard)
    new_field = spline_of(grid)
    seconds = {"smooth": time.perf_counter() - t0}
    options = SurfaceOptions(config.keep_topology, config.resolution, config.closed, "crisp" if hard else "soft", grid.cell)
    out, more = surface_of(new_field, mesh, options, progress, should_stop, seconds, "smooth")
    metrics = {
        "field_volume_change": enclosed_volume(grid) / max(volume_before, 1e-300) - 1.0,
        "flow_steps": float(figures["steps"]),
        "filter_passes": float(figures["passes"]),
        "grid_cell_length": grid.cell,
        "hard_surface": float(hard),
        "strength_in_grid_cells": config.strength / grid.cell,
        **more,
    }
    return TaskResult(out, new_field, metrics, seconds)
