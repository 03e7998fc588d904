"""Procedural test solids for benchmarks, built by our own code (no outside data).

A blacksmith's "anvil block": a box with a horn (cylinder) and a hanging ring (torus),
joined by hard unions so the surface has creases, corners, flat and curved regions.
"""

from __future__ import annotations

import numpy as np
import torch

from ..extract import extract_mesh
from ..field.analytic import RoundedBoxSDF
from ..field.base import SDFField
from ..mesh.types import TriangleMesh


class AnvilBlockSDF(SDFField):
    """Hard union of a box, a horizontal horn and a ring (not an exact distance inside unions)."""

    kind = "anvil_block"

    def __init__(self):
        super().__init__()
        self.box = RoundedBoxSDF((0.25, 0.14, 0.16), 0.01)

    def config(self) -> dict:
        return {}

    def forward(self, p):
        box = self.box(p - torch.tensor([-0.05, 0.0, 0.0]))
        q = p - torch.tensor([0.2, 0.0, 0.07])
        horn = torch.maximum(torch.sqrt(q[:, 1] ** 2 + q[:, 2] ** 2 + 1e-12) - 0.06 + 0.12 * q[:, 0].clamp(min=0), q[:, 0].abs() - 0.2)
        r = p - torch.tensor([-0.22, 0.0, 0.22])
        ring = torch.sqrt((torch.sqrt(r[:, 0] ** 2 + r[:, 2] ** 2 + 1e-12) - 0.07) ** 2 + r[:, 1] ** 2 + 1e-12) - 0.02
        return torch.minimum(torch.minimum(box, horn), ring)


def anvil_block(resolution: int = 160) -> TriangleMesh:
    """The anvil block as a mesh; resolution 160 gives about 50k vertices."""
    return extract_mesh(AnvilBlockSDF(), np.array([-0.45, -0.3, -0.3]), np.array([0.45, 0.3, 0.36]), resolution)
