"""Handles from an Edit Mode selection, their target empties, and what survives save, load and undo.

Reference geometry: Blender's own cube primitive (size 2: vertices at +-1 on each axis, so the top
face's four corners are (+-1, +-1, 1) and their centre is (0, 0, 1)).
"""

from __future__ import annotations

import math

import bpy
import mathutils
import numpy as np
import pytest


def _select(obj, mask):
    """Select exactly the vertices in `mask` and enter Edit Mode."""
    bpy.ops.object.mode_set(mode='EDIT')
    bpy.ops.mesh.select_all(action='DESELECT')
    bpy.ops.object.mode_set(mode='OBJECT')
    obj.data.vertices.foreach_set("select", mask)
    bpy.ops.object.mode_set(mode='EDIT')


def _cube_with_top_selected(location=(3.0, 0.0, 0.0)):
    bpy.ops.mesh.primitive_cube_add(size=2.0, location=location)
    obj = bpy.context.active_object
    co = np.empty(len(obj.data.vertices) * 3, dtype=np.float32)
    obj.data.vertices.foreach_get("co", co)
    top = co.reshape(-1, 3)[:, 2] > 0.5
    _select(obj, top)
    return obj, np.flatnonzero(top)


def _groups(addon, obj):
    return addon.handles.handle_groups(obj.data)


def test_add_handle_marks_selection_and_places_empty(empty_scene, addon):
    obj, top = _cube_with_top_selected()
    assert bpy.ops.isoclay.add_handle() == {'FINISHED'}
    assert obj.mode == 'EDIT'
    bpy.ops.object.mode_set(mode='OBJECT')
    groups = _groups(addon, obj)
    np.testing.assert_array_equal(np.flatnonzero(groups), top)
    assert set(groups[top]) == {1}
    empty = addon.handles.target_empties(obj)[1]
    assert empty.type == 'EMPTY' and empty.parent == obj
    assert empty.users_collection[0].name == f"{obj.name} targets"
    # centre of the cube's top face, moved with the object: (3, 0, 1) (Blender primitive, size 2)
    np.testing.assert_allclose(np.array(empty.matrix_world.translation), [3.0, 0.0, 1.0], atol=1e-6)

    handles_w, targets_w = addon.handles.handles_and_targets(obj)
    assert handles_w.shape == (4, 3)
    np.testing.assert_allclose(np.sort(handles_w[:, 0]), [2, 2, 4, 4], atol=1e-6)
    np.testing.assert_array_equal(targets_w, handles_w)  # untouched empty: exactly put


def test_moving_and_turning_the_empty_sets_targets(empty_scene, addon):
    obj, _ = _cube_with_top_selected()
    bpy.ops.isoclay.add_handle()
    bpy.ops.object.mode_set(mode='OBJECT')
    empty = addon.handles.target_empties(obj)[1]
    handles_w, _ = addon.handles.handles_and_targets(obj)

    empty.location.z += 0.5
    bpy.context.view_layer.update()
    _, targets_w = addon.handles.handles_and_targets(obj)
    np.testing.assert_allclose(targets_w, handles_w + [0.0, 0.0, 0.5], atol=1e-6)
    assert addon.handles.handle_summary(obj) == (1, 4, 1)

    # a quarter turn about z around the empty's centre (3, 0, 1.5): (x, y) -> (-y, x), common practice
    empty.rotation_euler.z = math.pi / 2
    bpy.context.view_layer.update()
    _, targets_w = addon.handles.handles_and_targets(obj)
    rel = handles_w - [3.0, 0.0, 1.0]
    expected = np.stack([-rel[:, 1], rel[:, 0], rel[:, 2]], axis=1) + [3.0, 0.0, 1.5]
    np.testing.assert_allclose(targets_w, expected, atol=1e-6)

    assert bpy.ops.isoclay.reset_targets() == {'FINISHED'}
    _, targets_w = addon.handles.handles_and_targets(obj)
    np.testing.assert_allclose(targets_w, handles_w, atol=1e-6)


def test_handles_survive_save_and_load(empty_scene, addon, tmp_path):
    obj, top = _cube_with_top_selected()
    bpy.ops.isoclay.add_handle()
    bpy.ops.object.mode_set(mode='OBJECT')
    addon.handles.target_empties(obj)[1].location.x += 0.25
    path = str(tmp_path / "handles.blend")
    bpy.ops.wm.save_as_mainfile(filepath=path)
    bpy.ops.wm.read_homefile(use_empty=True)
    assert "Cube" not in bpy.data.objects
    bpy.ops.wm.open_mainfile(filepath=path)
    obj = bpy.data.objects["Cube"]
    np.testing.assert_array_equal(np.flatnonzero(_groups(addon, obj)), top)
    handles_w, targets_w = addon.handles.handles_and_targets(obj)
    np.testing.assert_allclose(targets_w - handles_w, np.tile([0.25, 0.0, 0.0], (4, 1)), atol=1e-6)


def test_undo_restores_cleared_handles(empty_scene, addon):
    obj, top = _cube_with_top_selected()
    bpy.ops.isoclay.add_handle()
    bpy.ops.object.mode_set(mode='OBJECT')
    bpy.ops.ed.undo_push(message="handles added")  # initialises undo in a headless Blender
    assert bpy.ops.isoclay.clear_handles('EXEC_DEFAULT', True) == {'FINISHED'}
    obj = bpy.data.objects["Cube"]
    assert not _groups(addon, obj).any()
    assert "Cube target 1" not in bpy.data.objects
    bpy.ops.ed.undo()
    obj = bpy.data.objects["Cube"]  # references go stale across undo: look the object up again
    np.testing.assert_array_equal(np.flatnonzero(_groups(addon, obj)), top)
    assert addon.handles.target_empties(obj)[1].name == "Cube target 1"


def test_remove_handle_vertices_and_orphan_empty(empty_scene, addon):
    obj, top = _cube_with_top_selected()
    bpy.ops.isoclay.add_handle()
    bpy.ops.object.mode_set(mode='OBJECT')
    keep = np.zeros(len(obj.data.vertices), dtype=bool)
    keep[top[0]] = True
    _select(obj, keep)
    assert bpy.ops.isoclay.remove_handle() == {'FINISHED'}
    bpy.ops.object.mode_set(mode='OBJECT')
    np.testing.assert_array_equal(np.flatnonzero(_groups(addon, obj)), top[1:])
    assert 1 in addon.handles.target_empties(obj)
    _select(obj, np.isin(np.arange(len(obj.data.vertices)), top))
    bpy.ops.isoclay.remove_handle()
    bpy.ops.object.mode_set(mode='OBJECT')
    assert not _groups(addon, obj).any()
    assert addon.handles.target_empties(obj) == {}


def test_bad_handle_requests_get_clear_errors(empty_scene, addon):
    obj, _ = _cube_with_top_selected()
    bpy.ops.mesh.select_all(action='DESELECT')
    with pytest.raises(RuntimeError, match="no vertices selected"):
        bpy.ops.isoclay.add_handle()
    bpy.ops.object.mode_set(mode='OBJECT')
    with pytest.raises(RuntimeError, match="poll"):  # only offered in Edit Mode
        bpy.ops.isoclay.add_handle()
    with pytest.raises(addon.handles.HandleError, match="has no handles"):
        addon.handles.handles_and_targets(obj)
    # a handle whose empty was deleted by hand is named, not silently ignored
    _select(obj, np.ones(len(obj.data.vertices), dtype=bool))
    bpy.ops.isoclay.add_handle()
    bpy.ops.object.mode_set(mode='OBJECT')
    bpy.data.objects.remove(addon.handles.target_empties(obj)[1])
    with pytest.raises(addon.handles.HandleError, match="lost its target empty"):
        addon.handles.handles_and_targets(obj)


def test_boolean_handle_attribute_is_read_as_one_group(empty_scene, addon):
    # the demo scene may mark handles with a BOOLEAN attribute of the same name
    bpy.ops.mesh.primitive_cube_add(size=2.0)
    mesh = bpy.context.active_object.data
    attr = mesh.attributes.new("isoclay_handle", 'BOOLEAN', 'POINT')
    marks = np.array([True, False] * 4)
    attr.data.foreach_set("value", marks)
    np.testing.assert_array_equal(addon.handles.handle_groups(mesh), marks.astype(np.int32))


def test_per_vertex_empties_are_read_as_targets(empty_scene, addon):
    # the demo scene's convention: INT "isoclay_handle" = 1 and one empty per handle vertex in
    # "<object> targets" with custom property "isoclay_vertex"; the empty's location is the target
    bpy.ops.mesh.primitive_cube_add(size=2.0, location=(0.0, 1.0, 0.0))
    obj = bpy.context.active_object
    flags = np.zeros(8, dtype=np.int32)
    flags[[2, 5]] = 1
    obj.data.attributes.new("isoclay_handle", 'INT', 'POINT').data.foreach_set("value", flags)
    coll = bpy.data.collections.new(f"{obj.name} targets")
    bpy.context.scene.collection.children.link(coll)
    world = [np.array(obj.matrix_world @ obj.data.vertices[i].co) for i in (2, 5)]
    for i, shift in ((2, (0.0, 0.0, 0.0)), (5, (0.3, 0.0, 0.0))):
        empty = bpy.data.objects.new(f"{obj.name}.target.{i}", None)
        empty.location = (obj.matrix_world @ obj.data.vertices[i].co) + mathutils.Vector(shift)
        empty["isoclay_vertex"] = i
        coll.objects.link(empty)
    bpy.context.view_layer.update()
    handles_w, targets_w = addon.handles.handles_and_targets(obj)
    np.testing.assert_allclose(handles_w, world, atol=1e-6)
    np.testing.assert_array_equal(targets_w[0], handles_w[0])  # held: exactly still
    np.testing.assert_allclose(targets_w[1], handles_w[1] + [0.3, 0.0, 0.0], atol=1e-6)
    assert addon.handles.handle_summary(obj) == (2, 2, 1)
    assert bpy.ops.isoclay.clear_handles() == {'FINISHED'}
    assert f"{obj.name} targets" not in bpy.data.collections and "Cube.target.5" not in bpy.data.objects


def test_workshop_scene_handles_match_its_handle_file(empty_scene, addon):
    import json
    import os

    from conftest import ROOT

    blend = os.path.join(ROOT, "demo_blends", "workshop.blend")
    handle_file = os.path.join(ROOT, "demo_blends", "hook_handles.json")
    if not (os.path.isfile(blend) and os.path.isfile(handle_file)):
        pytest.skip("demo_blends/workshop.blend or hook_handles.json not generated (demo_blends/make_workshop.py)")
    with open(handle_file) as f:
        expected = json.load(f)
    bpy.ops.wm.open_mainfile(filepath=blend)
    handles_w, targets_w = addon.handles.handles_and_targets(bpy.data.objects["hook"])
    # the generator wrote the same handles and targets for the command line (float32 in the file)
    np.testing.assert_allclose(handles_w, expected["handles"], atol=1e-6)
    np.testing.assert_allclose(targets_w, expected["targets"], atol=1e-6)
