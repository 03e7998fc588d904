"""Elastic energy and lattice map against closed forms and numpy's SVD; mesh distortion measures against trimesh."""

import math

import numpy as np

from isoclay.energies.elastic import Constraints, ElasticSystem, polar_rotation, volume_projection
from isoclay.energies.mesh_distortion import distortion, edge_bend, face_stretch, flipped_faces
from isoclay.warp.lattice import SplineLattice


def _box(half):
    half = np.asarray(half, dtype=np.float64)

    def values(p):
        q = np.abs(p) - half
        return np.linalg.norm(np.maximum(q, 0), axis=1) + np.minimum(q.max(axis=1), 0)

    return values


def _no_constraints():
    z = np.zeros((0, 3))
    return Constraints(z, z, np.zeros(0), z, np.zeros((0, 3, 3)), np.zeros(0))


def test_polar_rotation_matches_the_svd_and_keeps_rotations():
    # Reference: the orthogonal polar factor U V^T from numpy's SVD with the reflection removed
    # (Higham 1986). Random near-rotations and some inverted matrices; tolerance 1e-10.
    rng = np.random.default_rng(0)
    q, _ = np.linalg.qr(rng.normal(size=(400, 3, 3)))
    q[np.linalg.det(q) < 0, :, 0] *= -1
    s = q @ (np.eye(3) + 0.3 * rng.normal(size=(400, 3, 3)))
    u, _, vt = np.linalg.svd(s)
    flip = np.linalg.det(u @ vt) < 0
    u[flip, :, 2] *= -1
    np.testing.assert_allclose(polar_rotation(s), u @ vt, atol=1e-10)
    np.testing.assert_allclose(polar_rotation(q), q, atol=1e-12)


def test_volume_projection_has_determinant_one_and_leaves_rotations():
    rng = np.random.default_rng(1)
    s = np.eye(3) + 0.2 * rng.normal(size=(100, 3, 3))
    s = s[np.linalg.det(s) > 0]
    np.testing.assert_allclose(np.linalg.det(volume_projection(s)), 1.0, rtol=1e-12)
    q, _ = np.linalg.qr(rng.normal(size=(10, 3, 3)))
    q[np.linalg.det(q) < 0, :, 0] *= -1
    np.testing.assert_allclose(volume_projection(q), q, atol=1e-12)


def test_lattice_reproduces_affine_maps_exactly():
    # Quadratic B-splines reproduce polynomials of degree <= 2 (de Boor, "A practical guide to
    # splines"): with control points moved by an affine map A x + b, phi is that map everywhere
    # and its gradient is A. Tolerance 1e-12.
    lat = SplineLattice.build(_box([0.3, 0.1, 0.1]), [-0.3, -0.1, -0.1], [0.3, 0.1, 0.1], 0.05)
    a = np.array([[1.1, 0.2, 0.0], [0.0, 0.9, 0.3], [0.1, 0.0, 1.0]])
    b = np.array([0.1, -0.2, 0.3])
    points = np.random.default_rng(2).uniform([-0.3, -0.1, -0.1], [0.3, 0.1, 0.1], size=(500, 3))
    np.testing.assert_allclose(lat.map(lat.rest, points), points, atol=1e-12)
    np.testing.assert_allclose(lat.map(lat.rest @ a.T + b, points), points @ a.T + b, atol=1e-12)
    np.testing.assert_allclose(lat.jacobian(lat.rest @ a.T + b, points), np.broadcast_to(a, (500, 3, 3)), atol=1e-11)


def test_parts_a_cell_apart_share_no_control_point():
    # Two slabs whose gap is 1.5 cells: their cells never touch, so no control point serves both
    # (virtual nodes, Molino et al. 2004); one slab can move without dragging the other.
    def values(p):
        return np.minimum(_box([0.2, 0.2, 0.05])(p - [0, 0, 0.1375]), _box([0.2, 0.2, 0.05])(p + [0, 0, 0.1375]))

    lat = SplineLattice.build(values, [-0.2, -0.2, -0.2], [0.2, 0.2, 0.2], 0.05)
    top = lat.cells[:, 2] * lat.cell + lat.origin[2] > 0
    assert not set(lat.dofs[top].ravel()) & set(lat.dofs[~top].ravel())


def test_elastic_energy_of_rigid_motion_and_uniform_scale():
    # ARAP energy sum_q w_q ||F - R||^2 (Chao et al. 2010): zero for a rigid motion; for a uniform
    # scale s, F = s I and R = I, so E = 3 (s - 1)^2 V with V the solid's volume (0.6 x 0.2 x 0.2
    # box, closed form). The volume term adds v ||s I - I||^2 V for the det-1 target I. Tolerance 1e-9.
    lat = SplineLattice.build(_box([0.3, 0.1, 0.1]), [-0.3, -0.1, -0.1], [0.3, 0.1, 0.1], 0.05)
    system = ElasticSystem(lat, _no_constraints(), volume_weight=0.5, tether=0.0)
    c, s_ = math.cos(0.4), math.sin(0.4)
    rot = np.array([[c, -s_, 0], [s_, c, 0], [0, 0, 1]])
    for control, expected in [(lat.rest @ rot.T + 0.2, 0.0), (1.2 * lat.rest, 1.5 * 3 * 0.2**2 * 0.6 * 0.2 * 0.2)]:
        target, constant = system.targets(control)
        energy = system.energy(control, system.right_hand_side(target), constant)
        np.testing.assert_allclose(energy, expected, atol=1e-9)
    np.testing.assert_allclose(lat.volume, 0.6 * 0.2 * 0.2, rtol=1e-9)


def _icosphere():
    import trimesh

    return trimesh.creation.icosphere(subdivisions=2, radius=0.4)


def test_mesh_stretch_of_scaled_and_rotated_mesh():
    # Uniform scale s of a mesh: every face metric is s^2 I (do Carmo 1976, sec. 2-5), so
    # face_stretch = s^2 - 1; a rotation gives 0. Tolerance 1e-9 (float64).
    m = _icosphere()
    v, f = np.asarray(m.vertices), np.asarray(m.faces)
    np.testing.assert_allclose(face_stretch(v, 1.1 * v, f), 1.1**2 - 1, rtol=1e-9)
    a = 0.7
    rot = np.array([[math.cos(a), -math.sin(a), 0], [math.sin(a), math.cos(a), 0], [0, 0, 1]])
    np.testing.assert_allclose(face_stretch(v, v @ rot.T, f), 0.0, atol=1e-9)
    d = distortion(v, v @ rot.T + 0.3, f)
    assert d.flipped == 0 and d.bend_max_rad < 1e-9 and d.stretch_max < 1e-9


def test_dihedral_change_matches_trimesh():
    # Reference: trimesh.Trimesh.face_adjacency_angles (angle between adjacent face normals).
    # Flattening the z-coordinate by 0.5 changes every dihedral angle; our per-edge change must
    # equal the difference of trimesh's angles. Tolerance 1e-9 rad.
    import trimesh

    m = _icosphere()
    v, f = np.asarray(m.vertices), np.asarray(m.faces)
    squashed = v * [1.0, 1.0, 0.5]
    edges, change = edge_bend(v, squashed, f)
    ref_before = dict(zip(map(tuple, np.sort(m.face_adjacency_edges, axis=1)), m.face_adjacency_angles))
    m2 = trimesh.Trimesh(squashed, f, process=False)
    ref_after = dict(zip(map(tuple, np.sort(m2.face_adjacency_edges, axis=1)), m2.face_adjacency_angles))
    expected = np.array([abs(ref_after[tuple(e)] - ref_before[tuple(e)]) for e in edges])
    assert len(edges) == len(m.face_adjacency_edges)
    np.testing.assert_allclose(change, expected, atol=1e-9)


def test_flipped_faces_counts_an_inverted_triangle():
    # Dragging one vertex across its ring, past a neighbour, folds the faces on the far side
    # over their neighbours: their normals reverse against the neighbourhood's best rotation
    # (Kabsch 1976); faces away from the vertex stay unflipped (common practice, no source).
    m = _icosphere()
    v, f = np.asarray(m.vertices), np.asarray(m.faces)
    ring = np.any(f == 0, axis=1)
    neighbour = int(f[ring][0][f[ring][0] != 0][0])
    dragged = v.copy()
    dragged[0] = v[0] + 2.5 * (v[neighbour] - v[0])
    flips = flipped_faces(v, dragged, f)
    assert flips.sum() >= 1
    assert not np.any(flips & ~ring)
    assert not flipped_faces(v, v * 1.3 + 0.1, f).any()
