"""A field's values at many points, no derivatives: the compiled path of the spline grids, torch otherwise."""

from __future__ import annotations

import numpy as np


def values(field, points, chunk: int = 262144) -> np.ndarray:
    """(n,) float32 field values (fast path for extraction). Fields with ``fast_values`` (the
    spline grids and their modules) are read without importing torch; any other field (a torch
    module: the MLP, a deformed field) is evaluated by torch without a graph."""
    fast = getattr(field, "fast_values", None)
    if fast is not None:
        return np.concatenate([fast(points[i : i + chunk]) for i in range(0, len(points), chunk)]) if len(points) else np.zeros(0, np.float32)
    import torch

    from .derivatives import as_points

    x = as_points(points)
    out = np.empty(len(x), dtype=np.float32)
    with torch.no_grad():
        for start in range(0, len(x), chunk):
            out[start : start + chunk] = field(x[start : start + chunk]).numpy()
    return out
