"""Stretch: change of the surface's first fundamental form under a warp.

A surface point p of the input maps to y = d^-1(p) in deformed space; tangent vectors T of
the input surface map to A = J_d(y)^-1 T (inverse function theorem). The pulled-back metric
G = A^T A (2x2 in an orthonormal tangent frame) equals the identity exactly when the warp
is a local isometry of the surface (do Carmo 1976, ch. 2-5, first fundamental form).
"""

from __future__ import annotations

import torch


def tangent_frames(normals: torch.Tensor) -> torch.Tensor:
    """(n, 3) unit normals -> (n, 3, 2) orthonormal tangent bases (columns), continuous away from -z."""
    helper = torch.zeros_like(normals)
    use_x = normals[:, 0].abs() < 0.9
    helper[use_x, 0] = 1.0
    helper[~use_x, 1] = 1.0
    t1 = torch.linalg.cross(normals, helper)
    t1 = t1 / t1.norm(dim=1, keepdim=True)
    t2 = torch.linalg.cross(normals, t1)
    return torch.stack([t1, t2], dim=2)


def pushforward(jacobian_d: torch.Tensor, frames: torch.Tensor) -> torch.Tensor:
    """A = J_d^-1 T : (n, 3, 3), (n, 3, 2) -> (n, 3, 2), the input's tangent frame carried into deformed space."""
    return torch.linalg.solve(jacobian_d, frames)


def tangent_metric(pushed: torch.Tensor) -> torch.Tensor:
    """G = A^T A : (n, 3, 2) -> (n, 2, 2)."""
    return pushed.transpose(1, 2) @ pushed


def stretch_density(metric: torch.Tensor) -> torch.Tensor:
    """||G - I||_F^2 per point (n,): zero for an isometry, 2 (s^2 - 1)^2 for a uniform scale s."""
    eye = torch.eye(2, dtype=metric.dtype, device=metric.device)
    return ((metric - eye) ** 2).sum(dim=(1, 2))


def stretch_value(metric: torch.Tensor) -> torch.Tensor:
    """Per-point stretch for display (n,): root-mean-square of (eigenvalue of G) - 1 over the two
    principal directions, so a uniform scale s reads s^2 - 1 (dimensionless)."""
    return torch.sqrt(stretch_density(metric) / 2.0)
