"""Closed-form signed distance fields for tests and references: sphere, torus, box, plane, cylinder."""

from __future__ import annotations

import torch

from .base import SDFField


class SphereSDF(SDFField):
    """|x - c| - r."""

    kind = "sphere"

    def __init__(self, radius: float = 0.4, center=(0.0, 0.0, 0.0)):
        super().__init__()
        self.radius = float(radius)
        self.register_buffer("center", torch.tensor(center, dtype=torch.float32))

    def config(self) -> dict:
        return {"radius": self.radius, "center": self.center.tolist()}

    def forward(self, points):
        return (points - self.center).norm(dim=1) - self.radius


class TorusSDF(SDFField):
    """Torus around the z axis: sqrt((sqrt(x^2 + y^2) - R)^2 + z^2) - r."""

    kind = "torus"

    def __init__(self, major: float = 0.3, minor: float = 0.1):
        super().__init__()
        self.major, self.minor = float(major), float(minor)

    def config(self) -> dict:
        return {"major": self.major, "minor": self.minor}

    def forward(self, points):
        q = torch.sqrt(points[:, 0] ** 2 + points[:, 1] ** 2) - self.major
        return torch.sqrt(q * q + points[:, 2] ** 2) - self.minor


class PlaneSDF(SDFField):
    """Signed distance to the plane n . x = offset (n normalised)."""

    kind = "plane"

    def __init__(self, normal=(0.0, 0.0, 1.0), offset: float = 0.0):
        super().__init__()
        n = torch.tensor(normal, dtype=torch.float32)
        self.register_buffer("normal", n / n.norm())
        self.offset = float(offset)

    def config(self) -> dict:
        return {"normal": self.normal.tolist(), "offset": self.offset}

    def forward(self, points):
        return points @ self.normal - self.offset


class CylinderSDF(SDFField):
    """Infinite cylinder around the z axis: sqrt(x^2 + y^2) - r."""

    kind = "cylinder"

    def __init__(self, radius: float = 0.3):
        super().__init__()
        self.radius = float(radius)

    def config(self) -> dict:
        return {"radius": self.radius}

    def forward(self, points):
        return torch.sqrt(points[:, 0] ** 2 + points[:, 1] ** 2) - self.radius


class RoundedBoxSDF(SDFField):
    """Axis-aligned box of half sizes b with edges rounded by radius r (r = 0: sharp box)."""

    kind = "rounded_box"

    def __init__(self, half_sizes=(0.3, 0.2, 0.2), rounding: float = 0.0):
        super().__init__()
        self.register_buffer("half_sizes", torch.tensor(half_sizes, dtype=torch.float32))
        self.rounding = float(rounding)

    def config(self) -> dict:
        return {"half_sizes": self.half_sizes.tolist(), "rounding": self.rounding}

    def forward(self, points):
        q = points.abs() - (self.half_sizes - self.rounding)
        outside = torch.sqrt((q.clamp(min=0.0) ** 2).sum(dim=1) + 1e-18)
        inside = q.max(dim=1).values.clamp(max=0.0)
        return outside + inside - self.rounding


ANALYTIC_KINDS = {cls.kind: cls for cls in (SphereSDF, TorusSDF, PlaneSDF, CylinderSDF, RoundedBoxSDF)}
