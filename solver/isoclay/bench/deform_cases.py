"""Deformation cases shared by the tests and `isoclay bench --only deform`, generated here.

Every case is a closed, manifold surface (so the tetrahedral reference can mesh it) with handle
groups given both ways: as vertex indices and targets for the reference (bench.elastic_reference)
and as the group form our deform task takes (points + 4 x 4 target transforms, world units).
Shapes are a blacksmith's stock: bars, a rod, a J hook, a lump of clay with a knob, a body with a
separate touching part.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Case:
    """name, what (one line), vertices (n, 3), faces (m, 3), groups: [(vertex ids (k,), 4x4 transform)]."""

    name: str
    what: str
    vertices: np.ndarray
    faces: np.ndarray
    groups: tuple

    def params(self, point_form: bool = False, **extra) -> dict:
        """Deform parameters in the group form, or the point form (each point to its target; a
        region's turn then left free where its points do not fix it)."""
        if point_form:
            ids, targets = self.reference_handles()
            return {"handles": self.vertices[ids], "targets": targets, **extra}
        return {"groups": [{"points": self.vertices[ids], "transform": t} for ids, t in self.groups], **extra}

    def reference_handles(self) -> tuple[np.ndarray, np.ndarray]:
        """(vertex ids (k,), targets (k, 3)) for the tetrahedral reference."""
        ids = np.concatenate([ids for ids, _ in self.groups])
        targets = np.concatenate([self.vertices[ids] @ t[:3, :3].T + t[:3, 3] for ids, t in self.groups])
        return ids, targets

    @property
    def diagonal(self) -> float:
        return float(np.linalg.norm(self.vertices.max(axis=0) - self.vertices.min(axis=0)))


def rotation(axis, angle: float) -> np.ndarray:
    """(3, 3) rotation by angle (radians) about axis (Rodrigues' formula)."""
    a = np.asarray(axis, dtype=np.float64)
    a = a / np.linalg.norm(a)
    k = np.array([[0, -a[2], a[1]], [a[2], 0, -a[0]], [-a[1], a[0], 0]])
    return np.eye(3) + math.sin(angle) * k + (1 - math.cos(angle)) * k @ k


def motion(rot: np.ndarray = np.eye(3), about=(0.0, 0.0, 0.0), shift=(0.0, 0.0, 0.0)) -> np.ndarray:
    """4 x 4: turn by rot about the point `about`, then move by shift."""
    t = np.eye(4)
    t[:3, :3] = rot
    t[:3, 3] = np.asarray(about) - rot @ np.asarray(about) + np.asarray(shift)
    return t


def box_mesh(extents, subdivisions: int) -> tuple[np.ndarray, np.ndarray]:
    """A closed box centred at the origin, its faces split evenly (trimesh midpoint subdivision)."""
    import trimesh

    m = trimesh.creation.box(extents=extents)
    for _ in range(subdivisions):
        m = m.subdivide()
    return np.asarray(m.vertices, dtype=np.float64), np.asarray(m.faces, dtype=np.int64)


def tube_mesh(centre: np.ndarray, radius: float, around: int = 16) -> tuple[np.ndarray, np.ndarray]:
    """A closed tube of round section along a polyline (n, 3), capped at both ends.

    Frames follow the line by parallel transport (no twist), so the rings never kink.
    """
    c = np.asarray(centre, dtype=np.float64)
    tangent = np.gradient(c, axis=0)
    tangent /= np.linalg.norm(tangent, axis=1, keepdims=True)
    helper = np.array([0.0, 0.0, 1.0]) if abs(tangent[0, 2]) < 0.9 else np.array([1.0, 0.0, 0.0])
    normal = np.cross(tangent[0], helper)
    normal /= np.linalg.norm(normal)
    normals = [normal]
    for i in range(1, len(c)):
        n = normals[-1] - tangent[i] * (normals[-1] @ tangent[i])
        normals.append(n / np.linalg.norm(n))
    normals = np.asarray(normals)
    binormals = np.cross(tangent, normals)
    ang = 2 * math.pi * np.arange(around) / around
    ring = (np.cos(ang)[None, :, None] * normals[:, None, :] + np.sin(ang)[None, :, None] * binormals[:, None, :]) * radius
    v = (c[:, None, :] + ring).reshape(-1, 3)
    faces = []
    for i in range(len(c) - 1):
        for j in range(around):
            a, b = i * around + j, i * around + (j + 1) % around
            faces += [[a, b, b + around], [a, b + around, a + around]]
    start, end = len(v), len(v) + 1
    v = np.concatenate([v, c[:1], c[-1:]])
    last = (len(c) - 1) * around
    for j in range(around):
        faces.append([start, (j + 1) % around, j])
        faces.append([end, last + j, last + (j + 1) % around])
    return v, np.asarray(faces, dtype=np.int64)


def _ids(mask) -> np.ndarray:
    return np.flatnonzero(mask).astype(np.int64)


def bar_lift_turn(subdivisions: int = 4) -> Case:
    """A bar 1.0 x 0.12 x 0.12: left end held, right end lifted 0.15 and tilted 30 degrees."""
    v, f = box_mesh([1.0, 0.12, 0.12], subdivisions)
    left, right = _ids(v[:, 0] < -0.5 + 1e-9), _ids(v[:, 0] > 0.5 - 1e-9)
    turn = motion(rotation([0, 0, 1], math.radians(30)), about=(0.5, 0, 0), shift=(0, 0.15, 0))
    return Case("bar_lift_turn", "bar lifted and tilted 30 degrees, other end held", v, f, ((left, np.eye(4)), (right, turn)))


def twist(subdivisions: int = 4) -> Case:
    """A square bar 1.0 x 0.15 x 0.15: left end held, right end turned a quarter turn about the axis."""
    v, f = box_mesh([1.0, 0.15, 0.15], subdivisions)
    left, right = _ids(v[:, 0] < -0.5 + 1e-9), _ids(v[:, 0] > 0.5 - 1e-9)
    turn = motion(rotation([1, 0, 0], math.pi / 2))
    return Case("twist", "square bar, one end turned a quarter turn about its axis", v, f, ((left, np.eye(4)), (right, turn)))


def rod_bend(around: int = 24, rings: int = 61) -> Case:
    """A round rod (length 1, radius 0.06) standing on z: bottom ring held, top ring carried to the end
    of a 45-degree arc of the same length and turned 45 degrees with it."""
    z = np.linspace(-0.5, 0.5, rings)
    v, f = tube_mesh(np.stack([np.zeros_like(z), np.zeros_like(z), z], axis=1), 0.06, around)
    bottom, top = _ids(v[:, 2] < -0.5 + 1e-9), _ids(v[:, 2] > 0.5 - 1e-9)
    theta = math.radians(45)
    r = 1.0 / theta
    end = np.array([r * (1 - math.cos(theta)), 0.0, -0.5 + r * math.sin(theta)])
    turn = motion(rotation([0, 1, 0], theta), about=(0, 0, 0.5), shift=end - np.array([0, 0, 0.5]))
    return Case("rod_bend", "rod, bottom held, top carried along a 45-degree arc and turned with it", v, f,
                ((bottom, np.eye(4)), (top, turn)))


def j_hook(around: int = 14) -> Case:
    """A J hook of round stock (radius 0.03): straight shank 0.7 long, a half-turn curl of radius 0.16
    and a short tip; the shank's top held, the tip pulled 0.08 toward the shank."""
    shank = np.stack([np.zeros(36), np.zeros(36), np.linspace(0.7, 0.0, 36)], axis=1)[:-1]
    a = np.linspace(math.pi, 2 * math.pi, 40)
    curl = np.stack([0.16 + 0.16 * np.cos(a), np.zeros_like(a), 0.16 * np.sin(a)], axis=1)
    tip = np.stack([np.full(8, 0.32), np.zeros(8), np.linspace(0.0, 0.12, 8)], axis=1)[1:]
    v, f = tube_mesh(np.concatenate([shank, curl, tip]), 0.03, around)
    top = _ids(v[:, 2] > 0.7 - 0.015)
    end = _ids((v[:, 2] > 0.105) & (v[:, 0] > 0.25))
    pull = motion(shift=(-0.08, 0.0, 0.0))
    return Case("j_hook", "J hook, shank top held, tip pulled toward the shank", v, f, ((top, np.eye(4)), (end, pull)))


def knob_in_ring(subdivisions: int = 4) -> Case:
    """A lump of clay (a sphere of radius 0.5 with a gentle dent pattern) with a ring of held vertices
    around its north pole; the pole's cap pulled out 0.1 along z."""
    import trimesh

    m = trimesh.creation.icosphere(subdivisions=subdivisions, radius=0.5)
    v = np.asarray(m.vertices, dtype=np.float64)
    d = v / np.linalg.norm(v, axis=1, keepdims=True)
    v = v * (1 + 0.04 * np.sin(3 * d[:, 0]) * np.cos(2 * d[:, 1]))[:, None]
    polar = np.degrees(np.arccos(np.clip(d[:, 2], -1, 1)))
    ring = _ids((polar > 33) & (polar < 40))
    cap = _ids(polar < 8)
    return Case("knob_in_ring", "lump with a ring of held vertices, the cap inside it pulled out", v,
                np.asarray(m.faces, dtype=np.int64), ((ring, np.eye(4)), (cap, motion(shift=(0, 0, 0.1)))))


def cantilever(subdivisions: int = 4, deflection: float = 0.02) -> Case:
    """A slender bar 1.0 x 0.06 x 0.06 clamped at its left end; the vertices on the right end face's
    horizontal centre line moved sideways (y) by `deflection` and free to turn about that line."""
    v, f = box_mesh([1.0, 0.06, 0.06], subdivisions)
    left = _ids(v[:, 0] < -0.5 + 1e-9)
    tip = _ids((v[:, 0] > 0.5 - 1e-9) & (np.abs(v[:, 1]) < 1e-9))
    return Case("cantilever", "slender bar clamped at one end, the other pushed sideways", v, f,
                ((left, np.eye(4)), (tip, motion(shift=(0, deflection, 0)))))


def euler_bernoulli_cantilever(x: np.ndarray, length: float, deflection: float) -> np.ndarray:
    """Deflection w(x) of a cantilever clamped at x = 0 and loaded at its tip x = L so that w(L) =
    deflection: w = deflection x^2 (3 L - x) / (2 L^3) (Euler-Bernoulli beam theory; e.g. Gere &
    Timoshenko, "Mechanics of materials", cantilever with a tip load, from memory)."""
    return deflection * x**2 * (3 * length - x) / (2 * length**3)


def all_cases() -> list[Case]:
    """The benchmark's cases at benchmark size."""
    return [bar_lift_turn(5), twist(5), rod_bend(32, 81), j_hook(18), knob_in_ring(5)]
