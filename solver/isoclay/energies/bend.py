"""Bend: change of the surface's shape operator (second fundamental form) under a warp.

With g = f o d, its Hessian at y is H_g = J^T H_f J + sum_i (df/dx_i) H_{d_i} (chain rule).
For input tangent vectors u, v (columns of the frame T) and their images a = J^-1 u, b = J^-1 v,
    II_after(u, v) = a^T H_g b / |grad g| = (u^T H_f v + a^T Q b) / |J^T grad f|,
with Q = sum_i (df/dx_i) H_{d_i}(y). The Weingarten map in the input's frame is
S_after = G^-1 II_after (G the pulled-back metric); its eigenvalues are the principal
curvatures of the deformed surface (do Carmo 1976, sec. 3-2 and 3-3). Before the warp,
S_before = T^T H_f T / |grad f| (Goldman 2005 for implicit surfaces). Sign: mean curvature
positive on convex shapes, as in isoclay.geometry.
"""

from __future__ import annotations

import torch


def shape_operator_input(grad_f: torch.Tensor, hess_f: torch.Tensor, frames: torch.Tensor) -> torch.Tensor:
    """S_before (n, 2, 2) from grad f (n, 3), Hessian of f (n, 3, 3) and tangent frames (n, 3, 2)."""
    return frames.transpose(1, 2) @ hess_f @ frames / grad_f.norm(dim=1)[:, None, None]


def shape_operator_deformed(
    jacobian_d: torch.Tensor,
    warp_hessian: torch.Tensor,
    grad_f: torch.Tensor,
    hess_f: torch.Tensor,
    frames: torch.Tensor,
    pushed: torch.Tensor,
    metric: torch.Tensor,
) -> torch.Tensor:
    """S_after (n, 2, 2) in the input's tangent frame.

    jacobian_d : (n, 3, 3) J_d at y; warp_hessian : (n, 3, 3) Q = sum_i (df/dx_i) H_{d_i}(y);
    grad_f, hess_f : f's derivatives at p = d(y); frames : (n, 3, 2) input tangent frame T;
    pushed : J^-1 T (n, 3, 2); metric : G = pushed^T pushed (n, 2, 2).
    """
    grad_g = (jacobian_d.transpose(1, 2) @ grad_f[:, :, None]).squeeze(2)
    second = frames.transpose(1, 2) @ hess_f @ frames + pushed.transpose(1, 2) @ warp_hessian @ pushed
    second = second / grad_g.norm(dim=1)[:, None, None]
    return torch.linalg.solve(metric, second)


def bend_density(before: torch.Tensor, after: torch.Tensor) -> torch.Tensor:
    """||S_after - S_before||_F^2 per point (n,), in 1 / length^2."""
    return ((after - before) ** 2).sum(dim=(1, 2))


def mean_curvature_of(shape_operator: torch.Tensor) -> torch.Tensor:
    """Mean curvature (k1 + k2) / 2 = trace / 2 of a (n, 2, 2) shape operator."""
    return 0.5 * (shape_operator[:, 0, 0] + shape_operator[:, 1, 1])
