"""Curvatures of level sets from gradient and Hessian (Goldman 2005, "Curvature formulas for implicit curves and surfaces").

Sign convention used everywhere in isoclay: the field is negative inside and its gradient
points outward; mean curvature is positive on convex shapes (a sphere of radius r has
mean curvature +1/r). Goldman's formula, written for the same gradient, gives -1/r; we
negate it once, here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch


def _adjugate(h):
    """Adjugate of symmetric 3x3 matrices (..., 3, 3) (works for numpy and torch)."""
    a, b, c = h[..., 0, 0], h[..., 0, 1], h[..., 0, 2]
    d, e, f = h[..., 1, 1], h[..., 1, 2], h[..., 2, 2]
    rows = [
        [d * f - e * e, c * e - b * f, b * e - c * d],
        [c * e - b * f, a * f - c * c, b * c - a * e],
        [b * e - c * d, b * c - a * e, a * d - b * b],
    ]
    if isinstance(h, torch.Tensor):
        return torch.stack([torch.stack(r, dim=-1) for r in rows], dim=-2)
    return np.stack([np.stack(r, axis=-1) for r in rows], axis=-2)


def mean_curvature(g, h):
    """Mean curvature (k1 + k2) / 2 of the level set through each point.

    g : (n, 3) gradient, h : (n, 3, 3) Hessian -> (n,). Goldman (2005) eq. for K_M, negated
    to our convention: (|g|^2 tr H - g^T H g) / (2 |g|^3).
    """
    lib = torch if isinstance(g, torch.Tensor) else np
    gg = (g * g).sum(-1)
    ghg = (g[..., :, None] * h * g[..., None, :]).sum((-1, -2))
    trace = h[..., 0, 0] + h[..., 1, 1] + h[..., 2, 2]
    return (gg * trace - ghg) / (2.0 * lib.sqrt(gg) ** 3)


def gaussian_curvature(g, h):
    """Gaussian curvature k1 k2: g^T adj(H) g / |g|^4 (Goldman 2005). (n, 3), (n, 3, 3) -> (n,)."""
    gg = (g * g).sum(-1)
    return (g[..., :, None] * _adjugate(h) * g[..., None, :]).sum((-1, -2)) / (gg * gg)


def principal_curvatures(g, h):
    """(k1, k2) with k1 >= k2, from mean H and Gaussian K: H +- sqrt(max(H^2 - K, 0))."""
    mean = mean_curvature(g, h)
    gauss = gaussian_curvature(g, h)
    disc = mean * mean - gauss
    root = disc.clamp(min=0).sqrt() if isinstance(disc, torch.Tensor) else np.sqrt(np.maximum(disc, 0))
    return mean + root, mean - root


@dataclass(frozen=True)
class Curvatures:
    """Per-point surface quantities, float64.

    normal : (n, 3) unit outward normal; mean, gaussian, k1, k2 : (n,) in 1/length
    """

    normal: np.ndarray
    mean: np.ndarray
    gaussian: np.ndarray
    k1: np.ndarray
    k2: np.ndarray


def curvatures(field, points) -> Curvatures:
    """Normals and curvatures of the field's level sets at points (n, 3)."""
    from .derivatives import evaluate

    s = evaluate(field, points, with_hessian=True)
    g, h = s.gradient, s.hessian
    k1, k2 = principal_curvatures(g, h)
    normal = g / np.linalg.norm(g, axis=1, keepdims=True)
    return Curvatures(normal, mean_curvature(g, h), gaussian_curvature(g, h), k1, k2)
