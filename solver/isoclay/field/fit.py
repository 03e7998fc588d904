"""Fit a field to a mesh: exact distances at spline nodes near the surface, optional Adam refinement.

Stages (each reported through ``progress``):
1. ``distance``: a coarse dense grid (``coarse_resolution`` cells) gets exact distances in a band
   around the surface, scattered from the triangles (distances.py), signed by winding numbers;
   far nodes an upper bound with the right sign (node_values.py). Its values become a cubic
   B-spline through a smoothed second-order quasi-interpolant (grids.dense_grid_from_distances).
2. ``detail``: where that coarse field misses the input's own vertices by more than
   ``refine_tolerance`` fine cells (curvature, thin parts, detail), blocks of a fine grid of
   ``resolution`` cells get exact distances too, and the fine spline of the residual is stored
   in those blocks only (grids.SparseGrid; sparse.SparseSplineSDF as a module). At
   ``resolution`` <= ``coarse_resolution`` the dense grid alone is the field (faster for small cases).
3. ``refine`` (optional, ``steps`` > 0): Adam on the coefficients with surface samples (f = 0,
   grad f = normal), exact near-surface samples and an eikonal term (Gropp et al. 2020,
   "Implicit geometric regularization for learning shapes").
Fields of kind "mlp" (the reference) skip 1-2 and train from samples alone.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass

import numpy as np

from ..errors import InvalidInput
from ..mesh.types import TriangleMesh
from ..callbacks import check_stop, never_stop, no_progress
from .node_values import buried_vertices, coarse_node_values, fine_node_values, refined_blocks
from .distances import BLOCK
from .grids import DEFAULT_HALF_EXTENT, SparseGrid, dense_grid_from_distances, smoothed_coefficients
from .supervision import SignedDistance, sample_surface
from .winding import WindingNumbers
from ..mesh.measures import edge_lengths, face_areas


@dataclass(frozen=True)
class FitConfig:
    """Settings of a field fit. Part of the field cache key and stored in checkpoints."""

    architecture: str = "spline"  # "spline" (default, fast on CPUs) or "mlp" (reference)
    # finest spline cells per axis over [-0.65, 0.65]^3 (1/790 of the object's longest side at
    # 1024): a fin 1/500 of the object thick still has a node inside it. Only refined blocks
    # pay for it (measured on the 45k-vertex anvil block: see docs/benchmark.md, remesh).
    resolution: int = 1024
    # the dense grid under the fine blocks: 128 cells (2.2M nodes, 9 MB) give every far node a
    # right sign and distance bound in about a second; resolution <= this is a dense-only field
    coarse_resolution: int = 128
    # exact distances for nodes within this many cells of the surface: the quasi-interpolant
    # reads one node beyond the 4x4x4 spline support of a point within a cell of the surface
    band: float = 4.0
    # refine where the coarse field misses the input's surface by more than this many cells of
    # ``resolution`` (0.25 at 1024: 3.2e-4 of the longest side; the demo anvil's mean distance to
    # its input 1.8e-5 -> 1.35e-5 diag-units with 0.1, at twice the fine blocks; measured)
    refine_tolerance: float = 0.25
    # Adam refinement steps after the spline interpolates exact distances. Measured on the
    # 45k-vertex anvil block: 0 steps gave Chamfer 2.9e-5 / Hausdorff 1.8e-3 diag in 2.2 s,
    # 40 steps 3.1e-5 / 2.1e-3 in 2.6 s: no gain, so off by default for splines. The MLP
    # reference trains from samples only and needs its fixed step count (see bench).
    steps: int = 0
    learning_rate: float = 2e-4  # per-step change of coefficients (unit-box lengths)
    batch: int = 8192  # surface points per refinement step
    near_samples: int = 100_000  # exact near-surface samples drawn once
    eikonal_weight: float = 0.05
    normal_weight: float = 0.05
    seed: int = 0

    def validated(self) -> "FitConfig":
        """This config if every setting is in its documented range (docs/parameters.md), else InvalidInput (one line)."""
        from .. import bounds

        if self.architecture not in ("spline", "mlp"):
            raise InvalidInput(f"unknown field architecture {bounds.shown(self.architecture)}: use 'spline' or 'mlp'")
        # 16 cells: coarser turns a prop into a blob; 1024: (1024+3)^3 float32 coefficients are 4.3 GB,
        # past any worker's memory limit (the pre-flight estimate refuses most jobs long before)
        bounds.whole_number("fit resolution", self.resolution, 16, 1024, "cells")
        # below half a cell the band misses nodes whose trilinear estimate is off; 8 cells already
        # queries about four times the nodes of the default 2 for the same surface
        bounds.number("fit band", self.band, 0.5, 8.0, "cells")
        # the dense grid under the fine blocks (a resolution at or below it is a dense-only field):
        # coarser than 16 loses far signs; 512 is already 1 GB of dense float32 coefficients
        bounds.whole_number("fit coarse_resolution", self.coarse_resolution, 16, 512, "cells")
        # refinement tolerance in finest cells: below 0.05 nearly every block is refined; past 4 none is
        bounds.number("fit refine_tolerance", self.refine_tolerance, 0.05, 4.0, "cells")
        # 100,000 Adam steps at 65-130 ms each (FACTS, one thread) are 2-4 hours, past the 1 h job limit
        bounds.whole_number("fit steps", self.steps, 0, 100_000)
        # a coefficient step of 0.1 unit-box lengths is a tenth of the object: Adam diverges (default 2e-4)
        bounds.number("fit learning_rate", self.learning_rate, 0.0, 0.1, open_low=True)
        # 256 points give a noisy step; 65,536 is 8x the default, ~0.5 s a step and ~1 GB of graph (estimated)
        bounds.whole_number("fit batch", self.batch, 256, 65_536, "points")
        # exact distances cost ~15 s per million queries on a 50k-face mesh (FACTS): 5 million are
        # over a minute before the first step, for no measured gain over the default 100,000
        bounds.whole_number("fit near_samples", self.near_samples, 1_000, 5_000_000, "points")
        # relative to the value term's weight 1; past 100 the fit ignores the surface it is fitting
        bounds.number("fit eikonal_weight", self.eikonal_weight, 0.0, 100.0)
        bounds.number("fit normal_weight", self.normal_weight, 0.0, 100.0)
        bounds.whole_number("fit seed", self.seed, 0, 2**32 - 1)  # numpy and torch both take 32-bit seeds
        return self

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class FittedField:
    """field : the fitted field (unit-box coordinates): an SDFField (torch module), or with
    fit_field(modules=False) a spline's plain grid (grids.DenseGrid or SparseGrid, values only);
    metrics : fit figures; seconds : per stage."""

    field: object
    config: FitConfig
    metrics: dict
    seconds: dict
    # parts the field cannot hold (thin.thin_parts): [{"part", "center" (unit box), "share"}]
    thin: tuple = ()


#: Exact distances on the coarse grid within this many of its cells (beyond: an upper bound);
#: the fine blocks, where detail is, use FitConfig.band.
COARSE_BAND = 3.0
#: Surface samples (beside the vertices) that decide where to refine: four per fine block of
#: surface, at most this many (2M: about a second of coarse-field queries).
SURFACE_SAMPLES_MAX = 2_000_000


#: Surface samples for the thin-part check of a dense-only field.
THIN_SAMPLES = 20_000


def _thin(field, points, normals, parts, cell) -> list:
    from .thin import thin_parts

    return thin_parts(field, points, normals, parts, cell)


#: The fine grid's cell is at most this fraction of the input's median edge: detail finer than its
#: own edges a mesh cannot carry (a 35k-vertex scan: edges 6.8e-3 -> 384 cells instead of 1024,
#: nine times fewer fine nodes; Chamfer to the scan unchanged at 256-cell output, measured).
EDGE_CELLS = 2.0
#: Parts count as thin for the coarse field when, a quarter and three quarters of its cell inside
#: their surface, the coarse field is not negative (then the fine grid goes to
#: FitConfig.resolution whatever the edges; a noisy 35k-vertex scan: 0.05% of its surface, a fin
#: 1/500 thick on a plate: 7%, measured).
THIN_PROBE = 0.25


def fine_resolution(mesh: TriangleMesh, coarse, config: FitConfig, rng) -> int:
    """Cells of the fine grid: enough for the input's own edge lengths (EDGE_CELLS cells a median
    edge), all of ``config.resolution`` where the coarse field misses thin parts; a multiple of
    the coarse grid's cells."""
    from .thin import REPORT_SHARE, not_held

    edges = edge_lengths(mesh.vertices, mesh.faces)
    median = float(np.median(edges[edges > 0])) if (edges > 0).any() else 1.0
    wanted = EDGE_CELLS * 2 * DEFAULT_HALF_EXTENT / median
    coarse_res = coarse.resolution
    points, normals = sample_surface(mesh, THIN_SAMPLES, rng)
    # not held a quarter cell in nor three quarters in: nothing solid there (a scanner's outlier,
    # which only pokes out, is held farther in)
    thin = not_held(coarse, points, normals, THIN_PROBE * coarse.cell) & not_held(coarse, points, normals, 3 * THIN_PROBE * coarse.cell)
    if thin.mean() > REPORT_SHARE:
        wanted = config.resolution
    steps = int(np.ceil(min(wanted, config.resolution) / coarse_res))
    return max(1, min(steps, config.resolution // coarse_res)) * coarse_res


def mesh_parts(faces: np.ndarray) -> tuple[bool, np.ndarray]:
    """(several sheets: the mesh has open rims, non-manifold edges or several parts; (m,) part label
    of each face)."""
    from ..mesh.measures import edge_face_counts, face_components

    _, counts, _ = edge_face_counts(faces)
    count, labels = face_components(int(faces.max()) + 1, faces)
    return bool((counts != 2).any() or count > 1), labels


def spline_field(mesh: TriangleMesh, config: FitConfig, progress=no_progress, should_stop=never_stop,
                 rng: np.random.Generator | None = None):
    """The spline field of a validated unit-box mesh as a plain grid: (DenseGrid or SparseGrid, metrics)."""
    v = np.ascontiguousarray(mesh.vertices, dtype=np.float64)
    f = np.ascontiguousarray(mesh.faces, dtype=np.int64)
    coarse_res = min(config.resolution, config.coarse_resolution)
    coarse_cell = 2 * DEFAULT_HALF_EXTENT / coarse_res
    winding = WindingNumbers(v, f, proxy_size=0.5 * coarse_cell)
    several, parts = mesh_parts(f)
    values, exact = coarse_node_values(v, f, coarse_res, DEFAULT_HALF_EXTENT, COARSE_BAND, winding,
                                       several, progress, should_stop)
    coarse = dense_grid_from_distances(values)
    del values
    metrics = {"exact_queries": float(exact), "coarse_resolution": float(coarse_res), "fine_blocks": 0.0,
               "refined_fraction": 0.0}
    if config.resolution <= coarse_res:
        metrics["winding_queries"] = float(winding.queries)
        rng = rng if rng is not None else np.random.default_rng(config.seed)
        points, normals, faces_of = sample_surface(mesh, THIN_SAMPLES, rng, with_faces=True)
        metrics["thin"] = _thin(coarse, points, normals, parts[faces_of], coarse_cell)
        return coarse, metrics
    check_stop(should_stop, "detail")
    rng = rng if rng is not None else np.random.default_rng(config.seed)
    resolution = fine_resolution(mesh, coarse, config, rng)
    metrics["fine_resolution"] = float(resolution)
    if resolution <= coarse_res:
        points, normals, faces_of = sample_surface(mesh, THIN_SAMPLES, rng, with_faces=True)
        metrics["thin"] = _thin(coarse, points, normals, parts[faces_of], coarse_cell)
        metrics["winding_queries"] = float(winding.queries)
        return coarse, metrics
    h = 2 * DEFAULT_HALF_EXTENT / resolution
    tolerance = config.refine_tolerance * 2 * DEFAULT_HALF_EXTENT / config.resolution  # of the finest cell asked for
    # the coarse field's miss at the input's vertices and at surface samples a few per fine block
    area = float(face_areas(v, f).sum())
    samples, sample_normals, sample_faces = sample_surface(mesh, int(min(SURFACE_SAMPLES_MAX, 4 * area / (BLOCK * h) ** 2)),
                                                           rng, with_faces=True)
    points = np.concatenate([v, samples])
    error = np.abs(coarse.fast_values(points)).astype(np.float64)
    buried = buried_vertices(v, f, error[: len(v)] > max(coarse_cell, tolerance), 2 * h, winding)
    error[: len(v)][buried] = 0.0
    allowed = refined_blocks(coarse, points, error, h, tolerance, resolution + 3)
    metrics["refined_fraction"] = float((error > tolerance).mean())
    metrics["winding_queries"] = float(winding.queries)
    progress("detail", 0.2, {"grid": resolution, "blocks": int(allowed.sum())})
    if not allowed.any():
        metrics["thin"] = _thin(coarse, samples, sample_normals, parts[sample_faces], coarse_cell)
        return coarse, metrics
    band, residual = fine_node_values(v, f, coarse, resolution, config.band, allowed, winding, parts)
    check_stop(should_stop, "detail")
    progress("detail", 0.7, {"grid": resolution, "blocks": len(band.blocks)})
    coefficients = smoothed_coefficients(residual, band.table, band.blocks)
    metrics["exact_queries"] += float(np.isfinite(band.distance).sum())
    metrics["fine_blocks"] = float(len(band.blocks))
    field = SparseGrid(resolution, DEFAULT_HALF_EXTENT, coarse_res, band.blocks, coefficients.astype(np.float32), coarse,
                       band.table)
    metrics["winding_queries"] = float(winding.queries)
    metrics["field_megabytes"] = field.nbytes() / 1e6
    metrics["thin"] = _thin(field, samples, sample_normals, parts[sample_faces], h)
    progress("detail", 1.0, {"grid": resolution, "blocks": len(band.blocks)})
    return field, metrics


def fit_field(
    mesh: TriangleMesh,
    config: FitConfig = FitConfig(),
    progress=no_progress,
    should_stop=never_stop,
    rng: np.random.Generator | None = None,
    modules: bool = True,
) -> FittedField:
    """Fit a field to a validated mesh in unit-box coordinates (see mesh.Normalization).

    modules : return the field as a torch module (what deform, smooth, sharpen, the cache and
    checkpoints need); False keeps a spline's plain grid (values only, torch never imported) unless
    the config itself needs torch (the MLP, refinement steps)."""
    config = config.validated()
    rng = rng if rng is not None else np.random.default_rng(config.seed)
    seconds = {}
    t0 = time.perf_counter()
    if config.architecture == "spline":
        field, metrics = spline_field(mesh, config, progress, should_stop, rng)
    else:
        field, metrics = None, {"exact_queries": 0.0}
    if modules or needs_torch(config):
        import torch

        from .mlp import MLPSDF

        torch.manual_seed(config.seed)
        field = MLPSDF() if field is None else field.module()
    seconds["distance"] = time.perf_counter() - t0

    t1 = time.perf_counter()
    if config.steps > 0:
        _refine(field, mesh, config, rng, progress, should_stop)
    seconds["refine"] = time.perf_counter() - t1
    seconds["total"] = time.perf_counter() - t0
    progress("fit", 1.0, {"seconds": seconds["total"]})
    thin = tuple(metrics.pop("thin", ()))
    return FittedField(field, config, metrics, seconds, thin)


def needs_torch(config: FitConfig) -> bool:
    """Whether fitting with this config runs torch (the MLP, Adam refinement steps)."""
    return config.architecture != "spline" or config.steps > 0


def _refine(field, mesh: TriangleMesh, config: FitConfig, rng, progress, should_stop) -> None:
    """Adam on samples: |f| on the surface, normal alignment, near-surface values, eikonal."""
    import torch

    distance = SignedDistance(mesh)
    surface, normals = sample_surface(mesh, max(config.batch * 8, 50_000), rng)
    near_count = config.near_samples
    if config.architecture == "mlp":
        # the reference recipe: half near the surface, half uniform in the box
        base, _ = sample_surface(mesh, near_count // 2, rng)
        near = np.concatenate([base + rng.normal(scale=0.01, size=base.shape), rng.uniform(-0.6, 0.6, (near_count // 2, 3))])
    else:
        base, _ = sample_surface(mesh, near_count, rng)
        near = base + rng.normal(scale=0.01, size=base.shape)
    near_sd = distance(near)
    t_surface = torch.as_tensor(surface, dtype=torch.float32)
    t_normals = torch.as_tensor(normals, dtype=torch.float32)
    t_near = torch.as_tensor(near, dtype=torch.float32)
    t_near_sd = torch.as_tensor(near_sd, dtype=torch.float32)
    lr = config.learning_rate if config.architecture == "spline" else 1e-3
    optimizer = torch.optim.Adam(field.parameters(), lr=lr)
    gen = torch.Generator().manual_seed(config.seed)
    batch = config.batch
    for step in range(config.steps):
        check_stop(should_stop, "refine")
        i = torch.randint(len(t_surface), (batch,), generator=gen)
        j = torch.randint(len(t_near), (batch,), generator=gen)
        p = t_surface[i].requires_grad_(True)
        q = t_near[j].requires_grad_(True)
        fp = field(p)
        fq = field(q)
        (gp,) = torch.autograd.grad(fp.sum(), p, create_graph=True)
        (gq,) = torch.autograd.grad(fq.sum(), q, create_graph=True)
        if config.architecture == "mlp":
            clamp = 0.1  # clamped L1 (Park et al. 2019, DeepSDF) on near and uniform samples
            loss = (fq.clamp(-clamp, clamp) - t_near_sd[j].clamp(-clamp, clamp)).abs().mean() + fp.abs().mean()
        else:
            loss = fp.abs().mean() + (fq - t_near_sd[j]).abs().mean()
        loss = loss + config.normal_weight * (gp - t_normals[i]).norm(dim=1).mean()
        loss = loss + config.eikonal_weight * ((gq.norm(dim=1) - 1.0) ** 2).mean()
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        optimizer.step()
        if step % 10 == 0 or step == config.steps - 1:
            progress("refine", (step + 1) / config.steps, {"step": step + 1, "loss": float(loss.detach())})
