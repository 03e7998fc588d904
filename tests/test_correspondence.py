"""Result-to-input correspondence (mesh.correspondence, pipeline.source_correspondence) and edit summaries.

References: barycentric coordinates of a triangle's own corners and centroid (elementary geometry);
libigl's point_mesh_squared_distance is the engine, checked against brute force over every
triangle (trimesh.triangles.closest_point); rotation angle of a 4x4 matrix from its trace
(common practice, no source).
"""

from __future__ import annotations

import math

import numpy as np
import trimesh

from isoclay.mesh.correspondence import barycentric, closest_surface_points, identity_correspondence
from isoclay.mesh.types import TriangleMesh
from isoclay.pipeline import prepare_mesh, source_correspondence
from isoclay.summaries import describe_edit


def test_barycentric_of_corners_and_centroid():
    a, b, c = np.array([[0.0, 0, 0]]), np.array([[2.0, 0, 0]]), np.array([[0.0, 1.0, 0.5]])
    pts = np.concatenate([a, b, c, (a + b + c) / 3])
    got = barycentric(pts, np.repeat(a, 4, 0), np.repeat(b, 4, 0), np.repeat(c, 4, 0))
    np.testing.assert_allclose(got, [[1, 0, 0], [0, 1, 0], [0, 0, 1], [1 / 3, 1 / 3, 1 / 3]], atol=1e-12)


def test_closest_points_match_brute_force_and_skip_degenerate_faces():
    sphere = trimesh.creation.icosphere(subdivisions=2)
    v, f = np.asarray(sphere.vertices), np.asarray(sphere.faces)
    # a zero-area face lying right on the query points' way must never be named
    v = np.vstack([v, [[0.0, 0.0, 1.0], [0.0, 0.0, 1.0]]])
    f = np.vstack([f, [[len(v) - 2, len(v) - 1, 0]]])
    rng = np.random.default_rng(3)
    points = rng.normal(size=(300, 3))
    points = points / np.linalg.norm(points, axis=1, keepdims=True) * rng.uniform(0.8, 1.2, (300, 1))
    points[0] = [0.0, 0.0, 1.05]
    got = closest_surface_points(points, v, f)
    assert got.face.dtype == np.int32 and got.bary.dtype == np.float32
    assert (got.face < len(f) - 1).all()  # the degenerate face is the last one
    ours = np.einsum("ij,ijk->ik", got.bary.astype(np.float64), v[f[got.face]])
    # brute force: the closest point on every usable triangle (trimesh.triangles.closest_point)
    tris = v[f[:-1]]
    best = np.full(len(points), np.inf)
    for t in range(len(tris)):
        cp = trimesh.triangles.closest_point(np.repeat(tris[t:t + 1], len(points), 0), points)
        best = np.minimum(best, np.linalg.norm(cp - points, axis=1))
    np.testing.assert_allclose(np.linalg.norm(ours - points, axis=1), best, atol=1e-6)  # float32 weights


def test_identity_when_the_result_kept_the_input_vertices():
    v = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], [5, 5, 5]])  # vertex 4 is loose
    f = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])
    corr = identity_correspondence(len(v), f)
    for i in range(4):
        assert i in f[corr.face[i]]
        np.testing.assert_array_equal(corr.bary[i], (f[corr.face[i]] == i).astype(np.float32))
    assert corr.face[4] == -1 and not corr.bary[4].any()
    # through the pipeline's rule: same vertex count and faces as the input means identity
    prepared = prepare_mesh(TriangleMesh(v.astype(float), f))
    moved = prepared.unit.with_vertices(prepared.unit.vertices * 1.01)
    again = source_correspondence(prepared, moved, None)
    np.testing.assert_array_equal(again.face[:4], corr.face[:4])


def test_summaries_say_what_the_edit_was():
    turn = math.radians(40)
    rot = [[math.cos(turn), -math.sin(turn), 0, 0.3], [math.sin(turn), math.cos(turn), 0, 0], [0, 0, 1, 0], [0, 0, 0, 1]]
    ident = [[1, 0, 0, 0], [0, 1, 0, 0], [0, 0, 1, 0], [0, 0, 0, 1]]
    moved = [[1, 0, 0, 0.12], [0, 1, 0, 0], [0, 0, 1, 0], [0, 0, 0, 1]]
    groups = [{"transform": rot}, {"transform": ident}, {"transform": moved}]
    assert describe_edit("deform", {"groups": groups, "stiffness": "firm"}) == \
        "3 handle groups, 1 held, 1 moved 0.12, 1 turned 40 degrees, firm"
    assert describe_edit("deform", {"handles": [[0, 0, 0], [1, 0, 0]], "targets": [[0, 0, 0], [1, 0.5, 0]],
                                    "stiffness": "medium", "keep_topology": True}) == \
        "2 handle points, 1 moved 0.5, medium, keep topology"
    assert describe_edit("smooth", {"strength": 0.002}) == "smooth 0.002, creases auto"
    assert describe_edit("smooth", {"strength": 0.002, "crisp_creases": True, "closed": True}) == \
        "smooth 0.002, creases crisp, closed"
    assert describe_edit("sharpen", {"amount": 0.6}) == "sharpen 0.6, radius detected"
    assert describe_edit("remesh", {"resolution": 128}) == "surface detail 128"
    assert describe_edit("deform", {"groups": [{"transform": "bad"}]}) == "deform"  # never raises
