"""Geometric queries on a field: values, derivatives, curvature, points on the surface.

Names load on first use (PEP 562 module __getattr__): the derivative queries need torch, the
values of a spline grid (field_values) do not, and a command-line rebuild imports only those.
"""

import importlib

_HOMES = {
    "Curvatures": ".curvature", "curvatures": ".curvature", "gaussian_curvature": ".curvature",
    "mean_curvature": ".curvature", "principal_curvatures": ".curvature",
    "FieldSample": ".derivatives", "evaluate": ".derivatives", "hessian": ".derivatives",
    "value_and_gradient": ".derivatives", "values": ".field_values",
    "LevelSetSample": ".sampling", "density_spread": ".sampling", "project_to_level_set": ".sampling",
    "reject_for_uniformity": ".sampling", "sample_level_set": ".sampling",
}
__all__ = sorted(_HOMES)


def __getattr__(name):
    if name not in _HOMES:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    return getattr(importlib.import_module(_HOMES[name], __name__), name)
