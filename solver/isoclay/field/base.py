"""What every signed distance field in isoclay is: a torch module from unit-box points to distances."""

from __future__ import annotations

import torch


class SDFField(torch.nn.Module):
    """A signed distance field in unit-box coordinates (see mesh.Normalization).

    forward(points : (n, 3) float32 tensor) -> (n,) float32, negative inside, ~|grad| = 1.
    Differentiable twice in the points (gradient and Hessian by autograd).
    Subclasses set ``kind`` and return their constructor arguments from ``config()``
    so checkpoints can rebuild them.
    """

    kind = "abstract"

    def config(self) -> dict:
        raise NotImplementedError
