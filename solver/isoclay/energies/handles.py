"""Handle term: each target point, mapped back by the warp, must land on its handle."""

from __future__ import annotations

import torch


def handle_energy(mapped_targets: torch.Tensor, handles: torch.Tensor) -> torch.Tensor:
    """Mean squared distance (scalar) between d(target) (k, 3) and the handles (k, 3).

    A static handle (target == handle) asks d to fix that point; moved handles ask d to
    carry the target back onto the handle, i.e. d^-1 to carry the handle onto the target.
    """
    return ((mapped_targets - handles) ** 2).sum(dim=1).mean()


def handle_errors(transported_handles: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
    """(k,) distance between where each handle went (d^-1(handle)) and where it should go."""
    return (transported_handles - targets).norm(dim=1)
