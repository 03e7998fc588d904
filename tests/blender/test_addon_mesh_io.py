"""Meshes in and out of Blender through the position and corner attributes, and result objects.

References: Blender's cube primitive (size 2: area 24, volume 8, elementary geometry) and
Blender's own matrix arithmetic (mathutils `Matrix @ Vector`).
"""

from __future__ import annotations

import bpy
import mathutils
import numpy as np
import pytest


def _grid(n_side: int) -> tuple[np.ndarray, np.ndarray]:
    """A wavy n_side x n_side vertex grid: (n, 3) float32 positions, (m, 3) triangles."""
    rng = np.random.default_rng(7)
    u, v = np.meshgrid(np.linspace(-1, 1, n_side), np.linspace(-1, 1, n_side), indexing="ij")
    pos = np.stack([u, v, 0.1 * np.sin(3 * u) * np.cos(2 * v)], axis=-1).reshape(-1, 3)
    pos += rng.normal(scale=1e-3, size=pos.shape)
    idx = np.arange(n_side * n_side).reshape(n_side, n_side)
    a, b, c, d = idx[:-1, :-1].ravel(), idx[1:, :-1].ravel(), idx[1:, 1:].ravel(), idx[:-1, 1:].ravel()
    faces = np.concatenate([np.stack([a, b, c], 1), np.stack([a, c, d], 1)])
    return pos.astype(np.float32), faces


def test_200k_vertex_round_trip_is_exact(empty_scene, addon):
    mio = addon.mesh_io
    pos, faces = _grid(448)  # 200,704 vertices
    assert len(pos) >= 200_000
    mesh = mio.build_mesh("big", pos, faces)
    obj = bpy.data.objects.new("big", mesh)
    bpy.context.scene.collection.objects.link(obj)
    assert len(mesh.vertices) == len(pos) and len(mesh.polygons) == len(faces)
    # exact: float32 in, float32 stored, float32 out
    np.testing.assert_array_equal(mio.read_positions(mesh), pos)
    np.testing.assert_array_equal(mio.read_triangles(mesh), faces)
    local, tri = mio.read_local_mesh(obj, bpy.context.evaluated_depsgraph_get())
    np.testing.assert_array_equal(local, pos)
    np.testing.assert_array_equal(tri, faces)
    # Blender's own slow path agrees with the fast attribute path
    co = np.empty(len(pos) * 3, dtype=np.float32)
    mesh.vertices.foreach_get("co", co)
    np.testing.assert_array_equal(co.reshape(-1, 3), pos)


def test_quads_are_triangulated_with_area_and_volume_kept(empty_scene, addon):
    bpy.ops.mesh.primitive_cube_add(size=2.0)
    obj = bpy.context.active_object
    world, faces = addon.mesh_io.read_world_mesh(obj, bpy.context.evaluated_depsgraph_get())
    assert faces.shape == (12, 3)
    a, b, c = world[faces[:, 0]], world[faces[:, 1]], world[faces[:, 2]]
    area = 0.5 * np.linalg.norm(np.cross(b - a, c - a), axis=1).sum()
    volume = np.einsum("ij,ij->i", a, np.cross(b, c)).sum() / 6.0  # divergence theorem; > 0 when outward
    np.testing.assert_allclose(area, 24.0, rtol=1e-6)   # cube of side 2: 6 * 4
    np.testing.assert_allclose(volume, 8.0, rtol=1e-6)  # 2^3, faces outward


def test_world_space_matches_blender_matrix_math(empty_scene, addon):
    bpy.ops.mesh.primitive_ico_sphere_add(subdivisions=2, radius=0.7, location=(1.0, -2.0, 3.0),
                                          rotation=(0.3, -0.2, 1.1), scale=(2.0, 0.5, 1.5))
    obj = bpy.context.active_object
    bpy.context.view_layer.update()
    world, _ = addon.mesh_io.read_world_mesh(obj, bpy.context.evaluated_depsgraph_get())
    expected = np.array([list(obj.matrix_world @ v.co) for v in obj.data.vertices])
    np.testing.assert_allclose(world, expected, atol=1e-5)
    back = addon.mesh_io.to_local(world, addon.mesh_io.matrix_to_numpy(obj.matrix_world))
    np.testing.assert_allclose(back, [list(v.co) for v in obj.data.vertices], atol=1e-6)


def test_result_object_sits_on_source_with_colours(empty_scene, addon):
    bpy.ops.mesh.primitive_ico_sphere_add(subdivisions=2, radius=1.0, location=(0.5, 0.0, 0.0), scale=(2, 2, 2))
    source = bpy.context.active_object
    material = bpy.data.materials.new("fired clay")
    source.data.materials.append(material)
    bpy.context.view_layer.update()
    world, faces = addon.mesh_io.read_world_mesh(source, bpy.context.evaluated_depsgraph_get())
    stretch = np.linspace(0.0, 1.0, len(world)).astype(np.float32)
    record = {"vertices": world * 1.1, "faces": faces, "vertex_values": {"stretch": stretch, "moved": stretch},
              "metrics": {"handle_error_max": 0.001}, "node_id": "ab" * 16}
    obj = addon.results.create_result_object(bpy.context, source, record, "deform")
    assert obj.name == f"{source.name} deform" and obj.isoclay.node_id == "ab" * 16
    assert obj.isoclay.source_key == source.isoclay.source_key != ""
    assert bpy.context.view_layer.objects.active == obj and source.hide_get()
    assert obj.data.materials[0] == material
    assert obj.matrix_world == source.matrix_world
    expected = np.array([list(obj.matrix_world.inverted() @ mathutils.Vector(p)) for p in world * 1.1])
    np.testing.assert_allclose(addon.mesh_io.read_positions(obj.data), expected, atol=1e-5)
    assert obj.data.color_attributes.active_color_name == "stretch"
    raw = np.empty(len(world), dtype=np.float32)
    obj.data.attributes["isoclay_stretch"].data.foreach_get("value", raw)
    np.testing.assert_array_equal(raw, stretch)
    assert "isoclay_moved" in obj.data.attributes
    np.testing.assert_allclose(obj.data["isoclay_stretch_scale"], np.percentile(stretch, 95), rtol=1e-6)
    assert obj["isoclay_metrics"]["handle_error_max"] == pytest.approx(0.001)
    # unchanged result: the next edit may start from its history node
    local, tri = addon.mesh_io.read_local_mesh(obj, bpy.context.evaluated_depsgraph_get())
    assert addon.results.node_for_edit(obj, local, tri) == "ab" * 16
    obj.location.x += 1.0
    bpy.context.view_layer.update()
    assert addon.results.node_for_edit(obj, local, tri) is None  # moved: must refit


def test_bad_meshes_are_refused_with_clear_errors(empty_scene, addon):
    mio = addon.mesh_io
    with pytest.raises(mio.MeshReadError, match="point at missing vertices"):
        mio.build_mesh("bad", np.zeros((3, 3)), np.array([[0, 1, 3]]))
    with pytest.raises(mio.MeshReadError, match=r"expected \(n, 3\)"):
        mio.build_mesh("bad", np.zeros((3, 2)), np.array([[0, 1, 2]]))
    depsgraph = bpy.context.evaluated_depsgraph_get()
    empty = bpy.data.objects.new("lonely", None)
    bpy.context.scene.collection.objects.link(empty)
    with pytest.raises(mio.MeshReadError, match="'lonely' is not a mesh object"):
        mio.read_local_mesh(empty, depsgraph)
    points = bpy.data.meshes.new("points")
    points.vertices.add(3)
    cloud = bpy.data.objects.new("cloud", points)
    bpy.context.scene.collection.objects.link(cloud)
    with pytest.raises(mio.MeshReadError, match="'cloud' has no faces"):
        mio.read_local_mesh(cloud, bpy.context.evaluated_depsgraph_get())
    mesh = mio.build_mesh("tri", np.eye(3), np.array([[0, 1, 2]]))
    with pytest.raises(mio.MeshReadError, match="2 values for 3 vertices"):
        mio.write_distortion(mesh, "stretch", np.zeros(2))
    bpy.ops.mesh.primitive_cube_add()
    flat = bpy.context.active_object
    flat.scale = (1.0, 0.0, 1.0)
    bpy.context.view_layer.update()
    with pytest.raises(mio.MeshReadError, match="scale is zero"):
        mio.to_local(np.zeros((1, 3)), mio.matrix_to_numpy(flat.matrix_world))


def test_distortion_view_switches_and_its_legend_has_the_numbers(empty_scene, addon):
    bpy.ops.mesh.primitive_ico_sphere_add(subdivisions=2)
    source = bpy.context.active_object
    world, faces = addon.mesh_io.read_world_mesh(source, bpy.context.evaluated_depsgraph_get())
    stretch = np.linspace(0.0, 2.0, len(world)).astype(np.float32)
    bend = np.linspace(1.0, 0.0, len(world)).astype(np.float32)
    record = {"vertices": world, "faces": faces, "vertex_values": {"stretch": stretch, "bend": bend},
              "metrics": {}, "node_id": "cd" * 16}
    obj = addon.results.create_result_object(bpy.context, source, record, "deform")
    colours = obj.data.color_attributes
    assert colours.active_color_name == "stretch"
    obj.isoclay.distortion_view = "bend"
    assert colours.active_color_name == "bend"
    legend = addon.results.distortion_legend(obj)
    # the bright end stands for the 95th percentile (numpy.percentile), the dark end for none
    assert legend["kind"] == "bend" and legend["low"] == 0.0
    np.testing.assert_allclose(legend["high"], np.percentile(bend, 95), rtol=1e-6)
    np.testing.assert_allclose(legend["max"], 1.0, rtol=1e-6)
    # drawn colours: 0 at the colour map's dark end, the scale and beyond at its bright end (linear storage)
    got = np.empty(len(world) * 4, dtype=np.float32)
    colours["bend"].data.foreach_get("color", got)
    got = got.reshape(-1, 4)
    ends = addon.colours.srgb_to_linear(addon.colours.RAMP_SRGB[[0, -1]])
    np.testing.assert_allclose(got[np.argmin(bend), :3], ends[0], atol=1e-6)
    np.testing.assert_allclose(got[np.argmax(bend), :3], ends[1], atol=1e-6)
    obj.isoclay.distortion_view = "none"
    assert addon.results.distortion_legend(obj) is None
