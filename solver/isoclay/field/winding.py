"""Inside or outside: generalized winding numbers (Jacobson et al. 2013), the fast approximation of
Barill et al. 2018 through libigl, asked only where a node's sign is not settled otherwise.

libigl builds its tree on every call (measured: 5.7 s for a 1.3M-face mesh, then about 11 us a
query), so a large mesh is first reduced to a proxy by vertex clustering; the proxy's winding
number is trusted only farther from the surface than the clustering size, and nearer nodes take
their side from the nearest triangle (see distances.py).
"""

from __future__ import annotations

import numpy as np

#: Meshes with more faces than this get a vertex-clustered proxy for winding numbers
#: (libigl's set-up for 300k faces: about 1 s, measured).
PROXY_FACES = 300_000


def cluster_mesh(vertices: np.ndarray, faces: np.ndarray, size: float) -> tuple[np.ndarray, np.ndarray]:
    """Vertex clustering (Rossignac & Borrel 1993): vertices merged per cube of side ``size``,
    faces that collapse dropped. Orientation and holes are kept, so winding numbers farther
    than about ``size`` from the surface stay right."""
    q = np.floor(vertices / size).astype(np.int64)
    q -= q.min(axis=0)
    span = q.max(axis=0) + 1
    key = (q[:, 0] * span[1] + q[:, 1]) * span[2] + q[:, 2]
    uniq, inverse = np.unique(key, return_inverse=True)
    counts = np.bincount(inverse, minlength=len(uniq)).astype(np.float64)
    centres = np.stack([np.bincount(inverse, weights=vertices[:, a], minlength=len(uniq)) for a in range(3)], axis=1)
    centres /= counts[:, None]
    f = inverse[faces]
    keep = (f[:, 0] != f[:, 1]) & (f[:, 1] != f[:, 2]) & (f[:, 0] != f[:, 2])
    return centres, np.ascontiguousarray(f[keep])


class WindingNumbers:
    """w(points (n, 3)) -> (n,) float64, about 1 inside, 0 outside, 1/2 on an open surface's
    fill; ``tolerance`` : unit-box distance below which the value is not trusted (0: exact mesh)."""

    def __init__(self, vertices: np.ndarray, faces: np.ndarray, proxy_size: float):
        if len(faces) > PROXY_FACES:
            self.vertices, self.faces = cluster_mesh(vertices, faces, proxy_size)
            self.tolerance = 2.0 * proxy_size
        else:
            self.vertices, self.faces = vertices, faces
            self.tolerance = 0.0
        self.vertices = np.ascontiguousarray(self.vertices, dtype=np.float64)
        self.faces = np.ascontiguousarray(self.faces, dtype=np.int64)
        self.queries = 0

    def __call__(self, points: np.ndarray) -> np.ndarray:
        import igl

        p = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        if len(p) == 0:
            return np.zeros(0)
        self.queries += len(p)
        return igl.fast_winding_number(self.vertices, self.faces, p)
