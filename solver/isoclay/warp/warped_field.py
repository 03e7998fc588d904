"""The deformed field g(x) = f(d(x)): an input field seen through a warp from deformed to input space."""

from __future__ import annotations

import torch

from ..field.base import SDFField
from .residual import ResidualWarp, WarpConfig


class WarpedSDF(SDFField):
    """g(x) = f(d(x)), negative inside the deformed shape.

    base : the input field f (any SDFField); warp : d, deformed -> input space.
    g has the same zero set as the deformed surface but is a distance only up to the
    warp's local stretch: |grad g| = |J_d^T grad f| lies in [(1 - c)^K, (1 + c)^K] for K
    blocks of Lipschitz bound c, and is close to 1 for the gentle warps of an edit.
    Twice differentiable when f is (the warp is smooth).
    """

    kind = "warped"

    def __init__(self, base: SDFField, warp: ResidualWarp):
        super().__init__()
        self.base = base
        self.warp = warp

    def config(self) -> dict:
        return {"base_kind": self.base.kind, "base": self.base.config(), **self.warp.config()}

    @classmethod
    def from_config(cls, base: SDFField, config: dict) -> "WarpedSDF":
        """Rebuild the module (then load its state dict) given the rebuilt base field."""
        return cls(base, ResidualWarp(WarpConfig.from_dict(config["warp"]), int(config.get("seed", 0))))

    def forward(self, points: torch.Tensor) -> torch.Tensor:
        return self.base(self.warp(points))
