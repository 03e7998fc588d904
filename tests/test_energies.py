"""Stretch, bend, volume and handle energies against closed forms; mesh distortion measures against trimesh."""

import math

import numpy as np
import pytest
import torch

from isoclay.energies.bend import bend_density, mean_curvature_of, shape_operator_deformed, shape_operator_input
from isoclay.energies.handles import handle_energy, handle_errors
from isoclay.energies.mesh_distortion import distortion, edge_bend, face_stretch, flipped_faces
from isoclay.energies.stretch import pushforward, stretch_density, stretch_value, tangent_frames, tangent_metric
from isoclay.energies.volume import volume_density
from isoclay.field.analytic import CylinderSDF, SphereSDF
from isoclay.tasks import deform
from isoclay.warp import ResidualWarp, WarpConfig


def _sphere_points(n, r, seed=0):
    x = torch.randn(n, 3, generator=torch.Generator().manual_seed(seed))
    return x / x.norm(dim=1, keepdim=True) * r


def _linear_warp(matrix) -> ResidualWarp:
    """A one-block warp d(y) = M y exactly (hidden branch switched off, linear skip = M - I)."""
    warp = ResidualWarp(WarpConfig(blocks=1), seed=0)
    with torch.no_grad():
        warp.blocks[0].out_weight[:, -3:] = torch.as_tensor(matrix, dtype=torch.float32) - torch.eye(3)
    for p in warp.parameters():
        p.requires_grad_(False)
    return warp


@pytest.mark.parametrize("s", [0.8, 1.25])
def test_uniformly_scaled_sphere(s):
    # A sphere of radius r scaled by s: the first fundamental form becomes s^2 times the old
    # one, so the metric's stretch is s^2 - 1 in every tangent direction, and the mean
    # curvature 1/r becomes 1/(s r) (do Carmo 1976, "Differential Geometry of Curves and
    # Surfaces", sec. 2-5 and 3-3, sphere example). Here d(y) = y / s maps deformed to input.
    # Computed through the whole chain (warp jets, pushforward, shape operators).
    # Tolerance 1e-4 relative (float32).
    r = 0.3
    field = SphereSDF(r)
    p = _sphere_points(300, r)
    surface = deform._surface_data(field, p)
    warp = _linear_warp(torch.eye(3) / s)
    y = warp.inverse(p).points
    np.testing.assert_allclose(y.numpy(), (p * s).numpy(), rtol=1e-5, atol=1e-6)
    parts = deform._energy_parts(warp, surface, y)
    eig = torch.linalg.eigvalsh(parts.metric)
    np.testing.assert_allclose(eig.numpy(), s * s, rtol=1e-4)
    np.testing.assert_allclose(stretch_value(parts.metric).numpy(), abs(s * s - 1), rtol=1e-3, atol=1e-5)
    np.testing.assert_allclose(stretch_density(parts.metric).numpy(), 2 * (s * s - 1) ** 2, rtol=1e-3, atol=1e-6)
    np.testing.assert_allclose(mean_curvature_of(surface.shape_before).numpy(), 1 / r, rtol=1e-4)
    np.testing.assert_allclose(mean_curvature_of(parts.shape_after).numpy(), 1 / (s * r), rtol=1e-4)
    # both principal curvatures change by 1/(s r) - 1/r: ||dS||_F^2 = 2 (1/(s r) - 1/r)^2
    np.testing.assert_allclose(parts.bend.numpy(), 2 * (1 / (s * r) - 1 / r) ** 2, rtol=1e-3)
    # volume: det J_d = s^-3 (change of variables), so (log det)^2 = (3 log s)^2
    np.testing.assert_allclose(parts.volume.numpy(), (3 * math.log(s)) ** 2, rtol=1e-4)


def test_rigid_motion_costs_nothing():
    # A rotation preserves both fundamental forms (do Carmo 1976, sec. 4-2, isometries).
    # Energies must vanish to float round-off (1e-10) on a cylinder, whose shape operator
    # has principal curvatures 1/r and 0 (do Carmo 1976, sec. 3-3, cylinder example).
    r = 0.2
    field = CylinderSDF(r)
    angle = torch.rand(200, generator=torch.Generator().manual_seed(1)) * 2 * math.pi
    z = torch.rand(200, generator=torch.Generator().manual_seed(2)) - 0.5
    p = torch.stack([r * torch.cos(angle), r * torch.sin(angle), z], dim=1)
    surface = deform._surface_data(field, p)
    k = torch.linalg.eigvalsh(0.5 * (surface.shape_before + surface.shape_before.transpose(1, 2)))
    np.testing.assert_allclose(k[:, 1].numpy(), 1 / r, rtol=1e-4)
    np.testing.assert_allclose(k[:, 0].numpy(), 0.0, atol=1e-3)
    a = 0.4
    rot = torch.tensor([[math.cos(a), 0, math.sin(a)], [0, 1, 0], [-math.sin(a), 0, math.cos(a)]])
    warp = _linear_warp(rot.T)  # d = R^-1: the deformation is the rotation R
    y = warp.inverse(p).points
    parts = deform._energy_parts(warp, surface, y)
    assert float(parts.stretch.max()) < 1e-10
    assert float(parts.bend.max()) < 1e-6 * (1 / r) ** 2
    assert float(parts.volume.max()) < 1e-10


def test_bend_sees_curvature_from_the_warp_hessian():
    # Bending a plane z = 0 by the warp d(x, y, z) = (x, y, z - a x^2 / 2) turns it into the
    # parabolic cylinder z = a x^2 / 2 whose curvature at the origin is a (do Carmo 1976, sec. 1-5,
    # curvature of a graph y'' / (1 + y'^2)^(3/2)). Checked through shape_operator_deformed with the
    # Hessian of d given in closed form. Tolerance 1e-6.
    a = 2.0
    n = 5
    grad_f = torch.tensor([[0.0, 0.0, 1.0]]).repeat(n, 1)
    hess_f = torch.zeros(n, 3, 3)
    frames = tangent_frames(grad_f)
    jac = torch.eye(3).repeat(n, 1, 1)  # at x = 0
    q = torch.zeros(n, 3, 3)
    q[:, 0, 0] = -a  # sum_i f_i H_{d_i} = H_{d_z} = diag(-a, 0, 0)
    pushed = pushforward(jac, frames)
    metric = tangent_metric(pushed)
    after = shape_operator_deformed(jac, q, grad_f, hess_f, frames, pushed, metric)
    before = shape_operator_input(grad_f, hess_f, frames)
    # the surface f(d(x)) = z - a x^2/2 = 0 bends towards +z, i.e. concave seen from the
    # outward side +z: principal curvatures (-a, 0) in our convention (convex positive)
    k = torch.linalg.eigvalsh(0.5 * (after + after.transpose(1, 2)))
    np.testing.assert_allclose(k.numpy(), np.tile([-a, 0.0], (n, 1)), atol=1e-6)
    np.testing.assert_allclose(bend_density(before, after).numpy(), a * a, rtol=1e-6)


def test_handle_terms():
    # Hand-computed: handle 0 exact, handle 1 off by (0, 0.3, 0.4) -> distance 0.5, mean squared 0.125.
    h = torch.tensor([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0]])
    mapped = torch.tensor([[0.0, 0.0, 0.0], [1.0, 0.3, 0.4]])
    assert float(handle_energy(mapped, h)) == pytest.approx(0.125, rel=1e-6)
    np.testing.assert_allclose(handle_errors(mapped, h).numpy(), [0.0, 0.5], rtol=1e-6)


def test_volume_density_signs():
    # (log det)^2 is symmetric in growth and shrinkage: det 2 and det 1/2 give (log 2)^2 (common practice, no source).
    j = torch.stack([torch.diag(torch.tensor([2.0, 1.0, 1.0])), torch.diag(torch.tensor([0.5, 1.0, 1.0]))])
    np.testing.assert_allclose(volume_density(j).numpy(), math.log(2) ** 2, rtol=1e-6)


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
