"""Compiled (numba) evaluation of uniform cubic B-splines, shared by the dense and the sparse field."""

from __future__ import annotations

import numba
import numpy as np


@numba.njit(cache=True)
def _basis(t):
    one = 1.0 - t
    t2 = t * t
    t3 = t2 * t
    return one * one * one / 6.0, (3 * t3 - 6 * t2 + 4) / 6.0, (-3 * t3 + 3 * t2 + 3 * t + 1) / 6.0, t3 / 6.0


@numba.njit(cache=True)
def _locate(x, e, h, r):
    xc = min(max(x, -e), e)
    u = (xc + e) / h
    b = min(max(int(np.floor(u)), 0), r - 1)
    return b, u - b, x - xc


@numba.njit(cache=True)
def weights_at(p, q, e, h, r, wx, wy, wz):
    """Fill the per-axis B-spline weights (4,) of point q of p (n, 3) on a grid of r cells over
    [-e, e]^3; returns the base node per axis and the point's offset outside the box."""
    bx, tx, ox = _locate(p[q, 0], e, h, r)
    by, ty, oy = _locate(p[q, 1], e, h, r)
    bz, tz, oz = _locate(p[q, 2], e, h, r)
    wx[0], wx[1], wx[2], wx[3] = _basis(tx)
    wy[0], wy[1], wy[2], wy[3] = _basis(ty)
    wz[0], wz[1], wz[2], wz[3] = _basis(tz)
    return bx, by, bz, ox, oy, oz


@numba.njit(cache=True)
def spline_values(p, e, h, r, c):
    n = p.shape[0]
    out = np.empty(n)
    wx = np.empty(4)
    wy = np.empty(4)
    wz = np.empty(4)
    for q in range(n):
        bx, by, bz, ox, oy, oz = weights_at(p, q, e, h, r, wx, wy, wz)
        s = 0.0
        for a in range(4):
            for b in range(4):
                wab = wx[a] * wy[b]
                for d in range(4):
                    s += wab * wz[d] * c[bx + a, by + b, bz + d]
        out[q] = s + np.sqrt(ox * ox + oy * oy + oz * oz + 1e-12) - 1e-6
    return out
