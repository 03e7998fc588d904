"""Invertible space warps: residual blocks with a Lipschitz bound, exact jets, fixed-point inverse."""

from .jets import PAIRS, Jet, symmetric_from_pairs
from .residual import InverseResult, ResidualBlock, ResidualWarp, WarpConfig
from .warped_field import WarpedSDF

__all__ = ["PAIRS", "InverseResult", "Jet", "ResidualBlock", "ResidualWarp", "WarpConfig", "WarpedSDF", "symmetric_from_pairs"]
