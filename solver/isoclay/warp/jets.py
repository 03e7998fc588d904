"""Second-order forward-mode derivatives ("jets") pushed through small networks.

A jet of a quantity u(y) over the three coordinates of y carries
    value : (n, D)     u(y)
    d1    : (n, 3, D)  du/dy_j          (row j = derivative along coordinate j)
    d2    : (n, 6, D)  d2u/dy_j dy_k    for the pairs PAIRS (j <= k)
Linear maps act on the last axis of all three; elementwise functions use the chain rule
d2 s(u) = s''(u) du_j du_k + s'(u) d2u_jk. Pushing jets forward costs about ten value
passes and gives the exact Jacobian and Hessian of a warp in one sweep, differentiable
once more for the parameter gradient (cheaper here than nested reverse-mode autograd).
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

#: The six index pairs (j, k), j <= k, of a symmetric 3x3 second derivative.
PAIRS = ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))
_J = torch.tensor([p[0] for p in PAIRS])
_K = torch.tensor([p[1] for p in PAIRS])


@dataclass(frozen=True)
class Jet:
    """value (n, D), d1 (n, 3, D) or None, d2 (n, 6, D) or None (see module docstring)."""

    value: torch.Tensor
    d1: torch.Tensor | None = None
    d2: torch.Tensor | None = None

    @classmethod
    def identity(cls, points: torch.Tensor, order: int = 2) -> "Jet":
        """The jet of y itself at points (n, 3): d1 = identity, d2 = 0."""
        n = points.shape[0]
        d1 = torch.eye(3, dtype=points.dtype, device=points.device).expand(n, 3, 3) if order >= 1 else None
        d2 = torch.zeros(n, 6, 3, dtype=points.dtype, device=points.device) if order >= 2 else None
        return cls(points, d1, d2)

    def linear(self, weight: torch.Tensor, bias: torch.Tensor | None = None) -> "Jet":
        """x -> x W^T + b on every part (the bias only on the value)."""
        value = self.value @ weight.T
        if bias is not None:
            value = value + bias
        return Jet(value, None if self.d1 is None else self.d1 @ weight.T, None if self.d2 is None else self.d2 @ weight.T)

    def elementwise(self, s: torch.Tensor, s1: torch.Tensor, s2: torch.Tensor | None) -> "Jet":
        """Apply a scalar function given its value s, first s1 and second s2 derivative at self.value."""
        d1 = d2 = None
        if self.d1 is not None:
            d1 = s1[:, None, :] * self.d1
        if self.d2 is not None:
            d2 = s2[:, None, :] * self.d1[:, _J] * self.d1[:, _K] + s1[:, None, :] * self.d2
        return Jet(s, d1, d2)

    def __add__(self, other: "Jet") -> "Jet":
        return Jet(
            self.value + other.value,
            None if self.d1 is None else self.d1 + other.d1,
            None if self.d2 is None else self.d2 + other.d2,
        )


def concat(jets: list[Jet]) -> Jet:
    """Concatenate jets along the feature axis."""
    value = torch.cat([j.value for j in jets], dim=-1)
    d1 = None if jets[0].d1 is None else torch.cat([j.d1 for j in jets], dim=-1)
    d2 = None if jets[0].d2 is None else torch.cat([j.d2 for j in jets], dim=-1)
    return Jet(value, d1, d2)


def symmetric_from_pairs(q: torch.Tensor) -> torch.Tensor:
    """(n, 6) values on PAIRS -> (n, 3, 3) symmetric matrices."""
    rows = [
        torch.stack([q[:, 0], q[:, 1], q[:, 2]], dim=1),
        torch.stack([q[:, 1], q[:, 3], q[:, 4]], dim=1),
        torch.stack([q[:, 2], q[:, 4], q[:, 5]], dim=1),
    ]
    return torch.stack(rows, dim=1)
