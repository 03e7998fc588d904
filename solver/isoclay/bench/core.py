"""Benchmark of the core: field fit and extraction, each against a reference run in the same process."""

from __future__ import annotations

import time

import numpy as np
import torch
from skimage.measure import marching_cubes

from ..extract import bounds_of, extract_mesh
from ..extract.marching import dense_grid_values, grid_layout
from ..field.fit import FitConfig, _refine, fit_field
from ..field.mlp import MLPSDF
from ..mesh.compare import surface_distance
from ..mesh.normalize import Normalization
from ..mesh.validate import validate_mesh
from ..warp.residual import ResidualWarp, WarpConfig
from ..warp.warped_field import WarpedSDF
from .shapes import anvil_block

#: Accuracy the issue asks of a fit, relative to the bounding-box diagonal.
TARGET_CHAMFER = 2e-3
TARGET_HAUSDORFF = 1e-2


def _accuracy(field, mesh, resolution=192, samples=50_000) -> dict:
    lo, hi = bounds_of(mesh.vertices)
    d = surface_distance(extract_mesh(field, lo, hi, resolution), mesh, samples)
    return {"chamfer_rel": d.chamfer_rel, "hausdorff_rel": d.hausdorff_rel, "normal_consistency": d.normal_consistency}


def _reference_time_to_target(mesh, budget_s: float, check_every: int) -> dict:
    """Train the reference MLP (4x128 softplus, positional encoding, eikonal, clamped L1) until it
    reaches the target accuracy or the time budget runs out; training time only."""
    torch.manual_seed(0)
    field = MLPSDF()
    config = FitConfig(architecture="mlp", steps=check_every, near_samples=400_000)
    rng = np.random.default_rng(0)
    trained = 0.0
    steps = 0
    history = []
    while trained < budget_s:
        t0 = time.perf_counter()
        _refine(field, mesh, config, rng, lambda *a: None, lambda: False)
        trained += time.perf_counter() - t0
        steps += check_every
        acc = _accuracy(field, mesh, resolution=128, samples=20_000)
        history.append({"steps": steps, "seconds": trained, **acc})
        if acc["chamfer_rel"] <= TARGET_CHAMFER and acc["hausdorff_rel"] <= TARGET_HAUSDORFF:
            return {"reached": True, "seconds": trained, "steps": steps, "history": history}
    return {"reached": False, "seconds": trained, "steps": steps, "history": history}


def run(quick: bool) -> dict:
    mesh_world = anvil_block(200)
    mesh = validate_mesh(Normalization.of(mesh_world.vertices).mesh_to_unit(mesh_world)).mesh
    out: dict = {"mesh": {"name": "anvil block (procedural)", "vertices": mesh.n_vertices, "faces": mesh.n_faces},
                 "threads": torch.get_num_threads()}

    t0 = time.perf_counter()
    fitted = fit_field(mesh, FitConfig())
    fit_seconds = time.perf_counter() - t0
    acc = _accuracy(fitted.field, mesh)
    out["fit"] = {"seconds": fit_seconds, **acc, "exact_queries": fitted.metrics["exact_queries"],
                  "meets_accuracy": acc["chamfer_rel"] <= TARGET_CHAMFER and acc["hausdorff_rel"] <= TARGET_HAUSDORFF}

    budget = 60.0 if quick else 240.0
    ref = _reference_time_to_target(mesh, budget, check_every=50 if quick else 100)
    out["reference_fit"] = {"model": "positional-encoding MLP 4x128 softplus, eikonal, clamped L1, Adam", **ref}
    out["fit"]["ratio_to_reference"] = fit_seconds / ref["seconds"]
    out["fit"]["ratio_is_upper_bound"] = not ref["reached"]  # reference did not reach the target in budget

    lo, hi = bounds_of(mesh.vertices)
    resolution = 128 if quick else 256
    out["extract"] = _extraction(fitted.field, lo, hi, resolution, with_torch_dense=True)
    # A deformation's result is extracted from f(d(x)): every node costs a pass through the
    # warp network. The warp is left at its identity start; weights do not change the cost.
    warped = WarpedSDF(fitted.field, ResidualWarp(WarpConfig()))
    out["extract_warped"] = {"field": "fitted field seen through a deformation warp (identity weights)",
                             **_extraction(warped, lo, hi, resolution, with_torch_dense=False)}
    return out


def _extraction(field, lo, hi, resolution: int, with_torch_dense: bool) -> dict:
    """Narrow-band extraction time against evaluating every node of the same grid."""
    stats: dict = {}
    band_seconds = np.inf
    for _ in range(2):  # best of two: the first call also pays for warming up torch and caches
        t0 = time.perf_counter()
        mesh = extract_mesh(field, lo, hi, resolution, stats=stats)
        band_seconds = min(band_seconds, time.perf_counter() - t0)
    origin, cell, cells = grid_layout(lo, hi, resolution)
    t0 = time.perf_counter()
    dense = dense_grid_values(field, origin, cell, tuple(cells + 1))  # the evaluator extraction uses
    dense_seconds = time.perf_counter() - t0
    t0 = time.perf_counter()
    marching_cubes(dense, 0.0, allow_degenerate=False)
    mc_seconds = time.perf_counter() - t0
    out = {"resolution": resolution, "grid_nodes": int(dense.size), "seconds": band_seconds,
           "evaluated_fraction": stats["evaluations"] / stats["dense_nodes"], "faces": mesh.n_faces,
           "dense_evaluation_seconds": dense_seconds, "ratio_to_dense": band_seconds / dense_seconds,
           "marching_cubes_alone_seconds": mc_seconds}
    if with_torch_dense:
        # the same grid through torch, the autograd-capable path every field has
        axes = [origin[d] + cell * np.arange(cells[d] + 1) for d in range(3)]
        t0 = time.perf_counter()
        with torch.no_grad():
            for x in axes[0]:
                plane = np.stack(np.meshgrid([x], axes[1], axes[2], indexing="ij"), axis=-1).reshape(-1, 3)
                field(torch.as_tensor(plane, dtype=torch.float32))
        out["dense_torch_evaluation_seconds"] = time.perf_counter() - t0
        out["ratio_to_dense_torch"] = band_seconds / out["dense_torch_evaluation_seconds"]
    return out
