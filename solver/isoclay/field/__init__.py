"""Signed distance fields: the model classes, fitting, checkpoints.

Names load on first use (PEP 562 module __getattr__): the model classes are torch modules, and
code that needs only the plain spline grids (grids.py: a command-line rebuild) never imports torch.
"""

import importlib

_HOMES = {"MLPSDF": ".mlp", "SDFField": ".base", "SplineSDF": ".spline", "spline_from_node_values": ".spline"}
__all__ = sorted(_HOMES)


def __getattr__(name):
    if name not in _HOMES:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    return getattr(importlib.import_module(_HOMES[name], __name__), name)
