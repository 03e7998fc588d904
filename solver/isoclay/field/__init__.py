"""Signed distance fields: the model classes, fitting, checkpoints."""

from .base import SDFField
from .mlp import MLPSDF
from .spline import SplineSDF, spline_from_node_values

__all__ = ["MLPSDF", "SDFField", "SplineSDF", "spline_from_node_values"]
