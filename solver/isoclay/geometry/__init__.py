"""Geometric queries on a field: values, derivatives, curvature, points on the surface."""

from .curvature import Curvatures, curvatures, gaussian_curvature, mean_curvature, principal_curvatures
from .derivatives import FieldSample, evaluate, hessian, value_and_gradient, values
from .sampling import LevelSetSample, density_spread, project_to_level_set, reject_for_uniformity, sample_level_set

__all__ = [
    "Curvatures", "FieldSample", "LevelSetSample", "curvatures", "density_spread", "evaluate",
    "gaussian_curvature", "hessian", "mean_curvature", "principal_curvatures", "project_to_level_set",
    "reject_for_uniformity", "sample_level_set", "value_and_gradient", "values",
]
