"""A positional-encoding MLP field: the straightforward architecture, kept as a reference."""

from __future__ import annotations

import math

import torch

from .base import SDFField


class MLPSDF(SDFField):
    """f(x) = MLP([x, sin(2^k pi x), cos(2^k pi x)]) with softplus activations.

    width, depth : hidden layer size and count
    frequencies : octaves of positional encoding
    beta : softplus sharpness; pre-activations are clamped at -80/beta so the derivative
        never underflows into denormals (FACTS: 3-7x slowdown otherwise)
    Initialised geometrically (Atzmon & Lipman 2020) to roughly a sphere of radius 0.3.
    """

    kind = "mlp"

    def __init__(self, width: int = 128, depth: int = 4, frequencies: int = 4, beta: float = 100.0):
        super().__init__()
        self.width, self.depth, self.frequencies, self.beta = width, depth, frequencies, beta
        in_dim = 3 + 6 * frequencies
        dims = [in_dim] + [width] * depth + [1]
        self.layers = torch.nn.ModuleList(torch.nn.Linear(a, b) for a, b in zip(dims[:-1], dims[1:]))
        for i, layer in enumerate(self.layers):
            if i == len(self.layers) - 1:
                torch.nn.init.normal_(layer.weight, mean=math.sqrt(math.pi) / math.sqrt(width), std=1e-4)
                torch.nn.init.constant_(layer.bias, -0.3)
            else:
                torch.nn.init.normal_(layer.weight, 0.0, math.sqrt(2) / math.sqrt(layer.out_features))
                torch.nn.init.zeros_(layer.bias)
                if i == 0:
                    layer.weight.data[:, 3:] = 0.0
        self.register_buffer("_freqs", (2.0 ** torch.arange(frequencies)) * math.pi, persistent=False)

    def config(self) -> dict:
        return {"width": self.width, "depth": self.depth, "frequencies": self.frequencies, "beta": self.beta}

    def forward(self, points: torch.Tensor) -> torch.Tensor:
        angles = points[:, :, None] * self._freqs
        h = torch.cat([points, torch.sin(angles).flatten(1), torch.cos(angles).flatten(1)], dim=1)
        floor = -80.0 / self.beta
        for layer in self.layers[:-1]:
            h = torch.nn.functional.softplus(layer(h).clamp(min=floor), beta=self.beta)
        return self.layers[-1](h).squeeze(1)
