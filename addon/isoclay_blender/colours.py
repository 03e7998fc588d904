"""The distortion view's colour map. No bpy."""

from __future__ import annotations

import numpy as np

# Colour map for distortion: viridis (van der Walt & Smith 2015, matplotlib's default), perceptually
# uniform and readable by colour-blind viewers; nine sRGB stops from memory, checked for steadily
# rising CIELAB lightness by tests/test_addon_limits.py. Stored linear (colour attributes are scene-linear).
RAMP_HEX = ("#440154", "#472c7a", "#3b518b", "#2c718e", "#21908d", "#27ad81", "#5cc863", "#aadc32", "#fde725")
RAMP_SRGB = np.array([[int(h[i:i + 2], 16) / 255.0 for i in (1, 3, 5)] for h in RAMP_HEX])
_RAMP_T = np.linspace(0.0, 1.0, len(RAMP_HEX))


def srgb_to_linear(c: np.ndarray) -> np.ndarray:
    """IEC 61966-2-1 sRGB transfer function, inverted."""
    c = np.asarray(c, dtype=np.float64)
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def ramp_srgb(t: np.ndarray) -> np.ndarray:
    """(n, 3) sRGB of the colour map at t in [0, 1] (interpolated between the stops)."""
    t = np.clip(np.nan_to_num(np.asarray(t, dtype=np.float64), nan=0.0), 0.0, 1.0)
    return np.stack([np.interp(t, _RAMP_T, RAMP_SRGB[:, c]) for c in range(3)], axis=1)


