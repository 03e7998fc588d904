"""Fit a field to a mesh: exact distances at spline nodes near the surface, optional Adam refinement.

Stages (each reported through ``progress``):
1. ``distance``: exact signed distances (libigl, winding-number sign) at the grid nodes, coarse
   to fine: every node of a coarse grid, then on each finer grid only the nodes whose
   interpolated estimate lies in a narrow band around the surface. Far nodes keep the
   interpolated estimate, whose sign is right, so the field has no floaters.
2. the node values become spline coefficients through a smoothed second-order
   quasi-interpolant (spline.spline_from_distances): C2, surface offset ~5e-5 unit-box
   lengths, curvature free of the facet noise that exact interpolation reproduces.
3. ``refine`` (optional, ``steps`` > 0): Adam on the coefficients with surface samples (f = 0, grad f = normal),
   exact near-surface samples and an eikonal term (Gropp et al. 2020, "Implicit geometric
   regularization for learning shapes"), which sharpens the zero level set between nodes.
Fields of kind "mlp" (the reference) skip 1-2 and train from samples alone.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass

import numpy as np
import scipy.ndimage
import torch

from ..errors import InvalidInput
from ..mesh.types import TriangleMesh
from ..callbacks import check_stop, never_stop, no_progress
from .base import SDFField
from .mlp import MLPSDF
from .spline import DEFAULT_HALF_EXTENT, spline_from_distances
from .supervision import SignedDistance, sample_surface


@dataclass(frozen=True)
class FitConfig:
    """Settings of a field fit. Part of the field cache key and stored in checkpoints."""

    architecture: str = "spline"  # "spline" (default, fast on CPUs) or "mlp" (reference)
    resolution: int = 128  # spline cells per axis over [-0.65, 0.65]^3: ~1/100 of the object
    band: float = 2.0  # exact distances for nodes within this many fine cells of the surface
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
    """field : the fitted SDFField (unit-box coordinates); metrics : fit figures; seconds : per stage."""

    field: SDFField
    config: FitConfig
    metrics: dict
    seconds: dict


def _node_grid(positions: np.ndarray) -> np.ndarray:
    x, y, z = np.meshgrid(positions, positions, positions, indexing="ij")
    return np.stack([x, y, z], axis=-1)


def _upsample(coarse: np.ndarray, coarse_pos: np.ndarray, fine_pos: np.ndarray) -> np.ndarray:
    """Trilinear interpolation of a grid of values onto a finer grid (positions per axis)."""
    idx = (fine_pos - coarse_pos[0]) / (coarse_pos[1] - coarse_pos[0])
    ii, jj, kk = np.meshgrid(idx, idx, idx, indexing="ij")
    return scipy.ndimage.map_coordinates(coarse, [ii, jj, kk], order=1, mode="nearest")


def node_distances(mesh: TriangleMesh, resolution: int, band: float, progress=no_progress, should_stop=never_stop):
    """Signed distances at the (R+3)^3 spline nodes, exact near the surface.

    Returns (values (R+3, R+3, R+3) float64, number of exact queries).
    """
    distance = SignedDistance(mesh)
    levels = [resolution]
    while levels[-1] > 24:
        levels.append(levels[-1] // 2)
    levels = levels[::-1]
    values = pos = None
    queries = 0
    for i, res in enumerate(levels):
        check_stop(should_stop, "distance")
        cell = 2 * DEFAULT_HALF_EXTENT / res
        new_pos = -DEFAULT_HALF_EXTENT + cell * (np.arange(res + 3) - 1.0)
        nodes = _node_grid(new_pos)
        if values is None:
            new = distance(nodes.reshape(-1, 3)).reshape(nodes.shape[:3])
            queries += new.size
        else:
            new = _upsample(values, pos, new_pos)
            coarse_cell = pos[1] - pos[0]
            # trilinear estimates of a distance are off by at most about half a coarse cell
            near = np.abs(new) < band * cell * np.sqrt(3) + 0.5 * coarse_cell * np.sqrt(3)
            new[near] = distance(nodes[near])
            queries += int(near.sum())
        values, pos = new, new_pos
        progress("distance", (i + 1) / len(levels), {"grid": res, "queries": queries})
    return values, queries


def fit_field(
    mesh: TriangleMesh,
    config: FitConfig = FitConfig(),
    progress=no_progress,
    should_stop=never_stop,
    rng: np.random.Generator | None = None,
) -> FittedField:
    """Fit a field to a validated mesh in unit-box coordinates (see mesh.Normalization)."""
    config = config.validated()
    rng = rng if rng is not None else np.random.default_rng(config.seed)
    torch.manual_seed(config.seed)
    seconds = {}
    t0 = time.perf_counter()
    if config.architecture == "spline":
        values, queries = node_distances(mesh, config.resolution, config.band, progress, should_stop)
        field = spline_from_distances(values)
    else:
        field, queries = MLPSDF(), 0
    seconds["distance"] = time.perf_counter() - t0

    t1 = time.perf_counter()
    if config.steps > 0:
        _refine(field, mesh, config, rng, progress, should_stop)
    seconds["refine"] = time.perf_counter() - t1
    seconds["total"] = time.perf_counter() - t0
    progress("fit", 1.0, {"seconds": seconds["total"]})
    return FittedField(field, config, {"exact_queries": float(queries)}, seconds)


def _refine(field: SDFField, mesh: TriangleMesh, config: FitConfig, rng, progress, should_stop) -> None:
    """Adam on samples: |f| on the surface, normal alignment, near-surface values, eikonal."""
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
