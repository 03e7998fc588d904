"""Volume term: local volume change of the warp near the surface, (log det J_d)^2.

det J_d is the factor by which d changes volume around a point (change of variables);
its logarithm is symmetric in growth and shrinkage and zero for rigid motions. The
residual construction keeps det J_d > 0, so the logarithm is always defined.
"""

from __future__ import annotations

import torch


def volume_density(jacobian_d: torch.Tensor) -> torch.Tensor:
    """(n,) (log det J_d)^2 at each sample."""
    return torch.log(torch.linalg.det(jacobian_d)) ** 2
