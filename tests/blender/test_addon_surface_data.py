"""Results keep the artist's data: keep topology is the source's own mesh data with new positions; a
rebuilt surface gets UVs, materials, colours and vertex groups through the edit's correspondence.

References: Blender's own primitives and data (the source mesh itself is the truth a keep-topology
result must equal); for rebuilt results, the source's value at the closest point of the source
surface (mathutils.bvhtree.BVHTree.find_nearest, Blender's own query), which is the correspondence
smoothing promises (CONTRACTS 2).
"""

from __future__ import annotations

import bpy
import numpy as np
from mathutils.bvhtree import BVHTree

from conftest import solver_tasks  # noqa: F401  (the solver fixture comes from conftest)

FIELD_RESOLUTION = 32


def _read(collection, attr, count, width=1, dtype=np.float32):
    buf = np.empty(count * width, dtype=dtype)
    collection.foreach_get(attr, buf)
    return buf.reshape(-1, width) if width > 1 else buf


def _weights(obj, group_name):
    index = obj.vertex_groups[group_name].index
    out = np.zeros(len(obj.data.vertices), dtype=np.float32)
    for v in obj.data.vertices:
        for g in v.groups:
            if g.group == index:
                out[v.index] = g.weight
    return out


def _rich_sphere():
    """A UV sphere with quads, two UV maps, two materials, seams, sharp edges, creases, a vertex group,
    a colour attribute, a float attribute, shape keys and custom split normals."""
    bpy.ops.mesh.primitive_uv_sphere_add(segments=24, ring_count=12, radius=1.0)
    obj = bpy.context.active_object
    mesh = obj.data
    n_v, n_p, n_e, n_l = len(mesh.vertices), len(mesh.polygons), len(mesh.edges), len(mesh.loops)
    second = mesh.uv_layers.new(name="detail")
    uv = _read(mesh.uv_layers[0].uv, "vector", n_l, 2)
    second.uv.foreach_set("vector", (uv * 0.5 + 0.25).ravel())
    for name in ("glaze", "bare clay"):
        mesh.materials.append(bpy.data.materials.new(name))
    mesh.polygons.foreach_set("material_index", (np.arange(n_p) % 2).astype(np.int32))
    mesh.edges.foreach_set("use_seam", (np.arange(n_e) % 7 == 0))
    mesh.attributes.new("sharp_edge", 'BOOLEAN', 'EDGE').data.foreach_set("value", np.arange(n_e) % 5 == 0)
    mesh.attributes.new("crease_edge", 'FLOAT', 'EDGE').data.foreach_set("value", (np.arange(n_e) % 3) / 2.0)
    co = _read(mesh.vertices, "co", n_v, 3)
    group = obj.vertex_groups.new(name="rim")
    for i in range(n_v):
        group.add((i,), float(0.5 + 0.5 * co[i, 2]), 'REPLACE')
    colours = mesh.color_attributes.new("slip", 'FLOAT_COLOR', 'POINT')
    colours.data.foreach_set("color", np.column_stack([co * 0.5 + 0.5, np.ones(n_v)]).astype(np.float32).ravel())
    mesh.attributes.new("wetness", 'FLOAT', 'POINT').data.foreach_set("value", co[:, 0].astype(np.float32))
    obj.shape_key_add(name="Basis")
    key = obj.shape_key_add(name="squash")
    key.data.foreach_set("co", (co * [1.2, 1.2, 0.7]).astype(np.float32).ravel())
    mesh.normals_split_custom_set_from_vertices([(0.0, 0.0, 1.0)] * n_v)
    bpy.context.view_layer.update()
    return obj


def test_keep_topology_is_the_source_mesh_with_new_positions(empty_scene, addon, solver):
    settings = bpy.context.scene.isoclay
    settings.field_resolution, settings.keep_topology, settings.smooth_strength = FIELD_RESOLUTION, True, 0.05
    source = _rich_sphere()
    mesh = source.data
    assert mesh.has_custom_normals
    assert bpy.ops.isoclay.smooth_shape('EXEC_DEFAULT', True) == {'FINISHED'}
    result = bpy.context.active_object
    out = result.data
    assert result != source and out != mesh
    # faces: the same quads and triangles, corner for corner (not re-triangulated)
    for attr, width, dtype in (("loop_start", 1, np.int32), ("loop_total", 1, np.int32), ("material_index", 1, np.int32)):
        np.testing.assert_array_equal(_read(out.polygons, attr, len(out.polygons), width, dtype),
                                      _read(mesh.polygons, attr, len(mesh.polygons), width, dtype))
    assert len(out.polygons) == len(mesh.polygons) and (_read(out.polygons, "loop_total", len(out.polygons), 1, np.int32) == 4).any()
    np.testing.assert_array_equal(_read(out.loops, "vertex_index", len(out.loops), 1, np.int32),
                                  _read(mesh.loops, "vertex_index", len(mesh.loops), 1, np.int32))
    # UV maps, exactly
    assert [u.name for u in out.uv_layers] == [u.name for u in mesh.uv_layers]
    for a, b in zip(out.uv_layers, mesh.uv_layers):
        np.testing.assert_array_equal(_read(a.uv, "vector", len(out.loops), 2), _read(b.uv, "vector", len(mesh.loops), 2))
    assert [m.name for m in out.materials] == ["glaze", "bare clay"]
    # seams, sharp edges, creases, colours and other attributes, exactly
    np.testing.assert_array_equal(_read(out.edges, "use_seam", len(out.edges), 1, bool),
                                  _read(mesh.edges, "use_seam", len(mesh.edges), 1, bool))
    for name, prop, width in (("sharp_edge", "value", 1), ("crease_edge", "value", 1), ("slip", "color", 4), ("wetness", "value", 1)):
        src, got = mesh.attributes[name], out.attributes[name]
        dtype = bool if src.data_type == 'BOOLEAN' else np.float32
        np.testing.assert_array_equal(_read(got.data, prop, len(got.data), width, dtype),
                                      _read(src.data, prop, len(src.data), width, dtype))
    # vertex group weights, exactly
    np.testing.assert_array_equal(_weights(result, "rim"), _weights(source, "rim"))
    # positions moved (the edit did something) ...
    before = _read(mesh.vertices, "co", len(mesh.vertices), 3)
    after = _read(out.vertices, "co", len(out.vertices), 3)
    assert np.abs(after - before).max() > 1e-4
    # ... the basis moved with them and the other key kept its offset from the basis (float32 storage)
    keys_src, keys_out = mesh.shape_keys.key_blocks, out.shape_keys.key_blocks
    assert [k.name for k in keys_out] == ["Basis", "squash"]
    basis_out = _read(keys_out["Basis"].data, "co", len(out.vertices), 3)
    np.testing.assert_array_equal(basis_out, after)
    np.testing.assert_allclose(_read(keys_out["squash"].data, "co", len(out.vertices), 3) - basis_out,
                               _read(keys_src["squash"].data, "co", len(mesh.vertices), 3)
                               - _read(keys_src["Basis"].data, "co", len(mesh.vertices), 3), atol=1e-6)
    # custom split normals belonged to the old shape: dropped, and the artist is told
    assert not out.has_custom_normals
    assert any("custom split normals" in note for note in result["isoclay_notes"])


def _textured_cylinder():
    """A cylinder with Blender's own UVs, caps in material 1, the side in material 0, a colour ramp along z."""
    bpy.ops.mesh.primitive_cylinder_add(vertices=32, radius=0.5, depth=1.5)
    obj = bpy.context.active_object
    mesh = obj.data
    for name in ("side", "cap"):
        mesh.materials.append(bpy.data.materials.new(name))
    normals = _read(mesh.polygons, "normal", len(mesh.polygons), 3)
    mesh.polygons.foreach_set("material_index", (np.abs(normals[:, 2]) > 0.9).astype(np.int32))
    co = _read(mesh.vertices, "co", len(mesh.vertices), 3)
    colours = mesh.color_attributes.new("glaze", 'FLOAT_COLOR', 'POINT')
    t = (co[:, 2] + 0.75) / 1.5
    colours.data.foreach_set("color", np.column_stack([t, 1 - t, 0.5 * np.ones_like(t), np.ones_like(t)]).astype(np.float32).ravel())
    group = obj.vertex_groups.new(name="top")
    for i in np.flatnonzero(co[:, 2] > 0):
        group.add((int(i),), 1.0, 'REPLACE')
    bpy.context.view_layer.update()
    return obj


def _source_queries(obj):
    mesh = obj.data
    mesh.calc_loop_triangles()
    co = _read(mesh.vertices, "co", len(mesh.vertices), 3).astype(np.float64)
    tris = _read(mesh.loop_triangles, "vertices", len(mesh.loop_triangles), 3, np.int32)
    loops = _read(mesh.loop_triangles, "loops", len(mesh.loop_triangles), 3, np.int32)
    poly = _read(mesh.loop_triangles, "polygon_index", len(mesh.loop_triangles), 1, np.int32)
    return BVHTree.FromPolygons(co.tolist(), tris.tolist()), co, tris, loops, poly


def _bary(p, a, b, c):
    m = np.array([b - a, c - a]).T
    vw = np.linalg.lstsq(m, p - a, rcond=None)[0]
    return np.array([1 - vw.sum(), vw[0], vw[1]])


def test_rebuilt_surface_carries_uvs_materials_colours_and_groups(empty_scene, addon, solver):
    settings = bpy.context.scene.isoclay
    settings.field_resolution, settings.keep_topology, settings.smooth_strength = FIELD_RESOLUTION, False, 0.03
    settings.surface_auto, settings.surface_resolution = False, 40
    source = _textured_cylinder()
    assert bpy.ops.isoclay.smooth_shape('EXEC_DEFAULT', True) == {'FINISHED'}
    result = bpy.context.active_object
    out = result.data
    assert len(out.vertices) != len(source.data.vertices)  # a rebuilt surface, not the source's vertices
    tree, co, tris, loops, poly = _source_queries(source)
    src_uv = _read(source.data.uv_layers[0].uv, "vector", len(source.data.loops), 2)
    src_mat = _read(source.data.polygons, "material_index", len(source.data.polygons), 1, np.int32)
    src_col = _read(source.data.color_attributes["glaze"].data, "color", len(source.data.vertices), 4)
    res_co = _read(out.vertices, "co", len(out.vertices), 3).astype(np.float64)
    res_uv = _read(out.uv_layers[0].uv, "vector", len(out.loops), 2)
    res_corner_vert = _read(out.loops, "vertex_index", len(out.loops), 1, np.int32)
    res_col = _read(out.color_attributes["glaze"].data, "color", len(out.vertices), 4)

    # the source value at each result vertex's closest source point (BVHTree.find_nearest)
    src_top = _weights(source, "top")
    near_uv, near_col, near_top = [], [], []
    for p in res_co:
        hit, _, t, _ = tree.find_nearest(p.tolist())
        w = _bary(np.array(hit), *co[tris[t]])
        near_uv.append(w @ src_uv[loops[t]])
        near_col.append(w @ src_col[tris[t]])
        near_top.append(w @ src_top[tris[t]])
    near_uv, near_col, near_top = np.array(near_uv), np.array(near_col), np.array(near_top)
    uv_err = np.abs(res_uv - near_uv[res_corner_vert]).max(axis=1)
    assert (uv_err <= 0.02).mean() >= 0.95, (uv_err <= 0.02).mean()
    col_err = np.abs(res_col - near_col).max(axis=1)
    assert (col_err <= 0.02).mean() >= 0.95, (col_err <= 0.02).mean()

    # material per face: that of the source face nearest the result face's centre
    res_tris = res_corner_vert.reshape(-1, 3)
    centres = res_co[res_tris].mean(axis=1)
    nearest = np.array([poly[tree.find_nearest(c.tolist())[2]] for c in centres])
    got = _read(out.polygons, "material_index", len(out.polygons), 1, np.int32)
    assert (got == src_mat[nearest]).mean() >= 0.97, (got == src_mat[nearest]).mean()
    assert {m.name for m in out.materials} == {"side", "cap"} and {0, 1} <= set(got.tolist())
    # vertex group "top" (weight 1 on the upper ring): carried per vertex like the colours
    top_err = np.abs(_weights(result, "top") - near_top)
    assert (top_err <= 0.02).mean() >= 0.95, (top_err <= 0.02).mean()
    # seams where the result changes UV island: the cap rims at least
    assert _read(out.edges, "use_seam", len(out.edges), 1, bool).sum() >= 2 * 32


def test_closest_points_on_triangles_match_blenders(addon):
    # the vectorised query that re-projects straddling corners, against mathutils.geometry.closest_point_on_tri
    from mathutils.geometry import closest_point_on_tri

    rng = np.random.default_rng(1)
    a, b, c, p = (rng.normal(size=(500, 3)) for _ in range(4))
    got = addon.transfer.closest_on_triangles(p, a, b, c)
    ref = np.array([closest_point_on_tri(*(x.tolist() for x in xs)) for xs in zip(p, a, b, c)])
    np.testing.assert_allclose(got, ref, atol=1e-5)  # mathutils works in float32
