"""Value, gradient and Hessian of a field at many points, by automatic differentiation."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

#: Points per chunk when no graph is kept; bounds memory for the (n, 64) spline gathers.
CHUNK = 65536


def as_points(points, device=None) -> torch.Tensor:
    """(n, 3) array-like -> float32 tensor (a new tensor; the caller's array is never touched)."""
    t = torch.as_tensor(np.asarray(points) if not isinstance(points, torch.Tensor) else points)
    return t.detach().to(dtype=torch.float32, device=device).reshape(-1, 3).clone()


def value_and_gradient(field, points: torch.Tensor, create_graph: bool = False):
    """f : (n,), grad f : (n, 3). With create_graph the results stay differentiable."""
    x = points if points.requires_grad else points.detach().requires_grad_(True)
    with torch.enable_grad():
        f = field(x)
        (g,) = torch.autograd.grad(f.sum(), x, create_graph=True)
    if not create_graph:
        return f.detach(), g.detach()
    return f, g


def hessian(field, points: torch.Tensor, create_graph: bool = False):
    """f : (n,), grad f : (n, 3), Hessian : (n, 3, 3) (symmetric) at points (n, 3)."""
    x = points if points.requires_grad else points.detach().requires_grad_(True)
    with torch.enable_grad():
        f, g = value_and_gradient(field, x, create_graph=True)
        rows = [torch.autograd.grad(g[:, i].sum(), x, create_graph=create_graph, retain_graph=True)[0] for i in range(3)]
    h = torch.stack(rows, dim=1)
    h = 0.5 * (h + h.transpose(1, 2))
    if not create_graph:
        return f.detach(), g.detach(), h.detach()
    return f, g, h


@dataclass(frozen=True)
class FieldSample:
    """Queries at points, numpy float64 for callers outside torch.

    value : (n,), gradient : (n, 3), hessian : (n, 3, 3) or None
    """

    value: np.ndarray
    gradient: np.ndarray
    hessian: np.ndarray | None


def evaluate(field, points, with_hessian: bool = False, chunk: int = CHUNK) -> FieldSample:
    """Chunked, graph-free evaluation of a field at (n, 3) points."""
    x = as_points(points)
    vals, grads, hess = [], [], []
    for start in range(0, len(x), chunk):
        part = x[start : start + chunk]
        if with_hessian:
            f, g, h = hessian(field, part)
            hess.append(h.double().numpy())
        else:
            f, g = value_and_gradient(field, part)
        vals.append(f.double().numpy())
        grads.append(g.double().numpy())
    return FieldSample(
        np.concatenate(vals) if vals else np.zeros(0),
        np.concatenate(grads) if grads else np.zeros((0, 3)),
        (np.concatenate(hess) if hess else np.zeros((0, 3, 3))) if with_hessian else None,
    )
