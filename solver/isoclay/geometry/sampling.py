"""Points on a field's zero level set: Newton-like projection plus density rejection for uniformity."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.spatial
import torch

from .derivatives import as_points, value_and_gradient


def project_to_level_set(field, points, iterations: int = 8, chunk: int = 65536) -> tuple[np.ndarray, np.ndarray]:
    """Move points (n, 3) onto f = 0 by x <- x - f grad f / |grad f|^2, repeated.

    Returns (projected (n, 3) float64, |f| after the last step (n,)). The caller's array is
    not modified. Steps are clipped to 0.25 unit-box lengths so a bad gradient cannot throw
    a point across the object.
    """
    x = as_points(points)
    residual = torch.empty(len(x))
    for start in range(0, len(x), chunk):
        part = x[start : start + chunk]
        for _ in range(iterations):
            f, g = value_and_gradient(field, part)
            step = (f / (g * g).sum(1).clamp(min=1e-8))[:, None] * g
            norm = step.norm(dim=1, keepdim=True)
            part = part - step * torch.clamp(0.25 / norm.clamp(min=1e-12), max=1.0)
        f, _ = value_and_gradient(field, part)
        x[start : start + chunk] = part
        residual[start : start + chunk] = f.abs()
    return x.double().numpy(), residual.double().numpy()


def knn_radius(points: np.ndarray, k: int = 16) -> np.ndarray:
    """(n,) distance to the k-th nearest neighbour (excluding the point itself)."""
    tree = scipy.spatial.cKDTree(points)
    d, _ = tree.query(points, k=k + 1)
    return d[:, -1]


def density_spread(points: np.ndarray, k: int = 16) -> float:
    """Uniformity score: 90th / 10th percentile of the k-NN radius squared (1 = perfectly even)."""
    r2 = knn_radius(points, k) ** 2
    return float(np.percentile(r2, 90) / np.percentile(r2, 10))


def reject_for_uniformity(points: np.ndarray, rng: np.random.Generator, k: int = 16, passes: int = 2) -> np.ndarray:
    """Thin oversampled regions: keep each point with probability min(1, r_k^2 / p90(r_k^2))."""
    for _ in range(passes):
        if len(points) <= k + 1:
            break
        r2 = knn_radius(points, k) ** 2
        keep = rng.random(len(points)) < np.minimum(1.0, r2 / np.percentile(r2, 90))
        points = points[keep]
    return points


@dataclass(frozen=True)
class LevelSetSample:
    """points : (n, 3) float64 on the surface; residual : (n,) |f| there; spread : density_spread."""

    points: np.ndarray
    residual: np.ndarray
    spread: float


def sample_level_set(
    field, seeds, count: int, rng: np.random.Generator, tolerance: float = 1e-3, iterations: int = 8
) -> LevelSetSample:
    """About ``count`` near-uniform points on f = 0, grown from seed points near the surface.

    seeds : (m, 3) starting points (mesh samples, a jittered band...). Points still farther
        than ``tolerance`` from the level set after projection are dropped; the rest are
        thinned for uniform density, then subsampled to ``count``.
    """
    seeds = np.asarray(seeds, dtype=np.float64)
    projected, residual = project_to_level_set(field, seeds, iterations)
    close = residual <= tolerance
    points = reject_for_uniformity(projected[close], rng)
    if len(points) > count:
        points = points[rng.choice(len(points), count, replace=False)]
    from .field_values import values

    res = np.abs(values(field, points)).astype(np.float64)
    spread = density_spread(points) if len(points) > 20 else float("nan")
    return LevelSetSample(points, res, spread)
