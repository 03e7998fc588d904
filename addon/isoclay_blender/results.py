"""Turning a solver result into a Blender object next to its source."""

from __future__ import annotations

import bpy
import numpy as np

from . import mesh_io
from .properties import ensure_source_key

DISTORTIONS = ("stretch", "bend")


def field_of(record, name, default=None):
    """Read `name` from a result record (the client's MeshRecord, or a dict)."""
    if isinstance(record, dict):
        return record.get(name, default)
    return getattr(record, name, default)


def _plain(value):
    if isinstance(value, (bool, int, float, str)):
        return value
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items() if _plain(v) is not None}
    if isinstance(value, (list, tuple)) and all(isinstance(v, (int, float)) for v in value):
        return list(value)
    if isinstance(value, np.generic):
        return value.item()
    return None


def create_result_object(context, source: bpy.types.Object, record, task: str,
                         keep_source_visible: bool = False) -> bpy.types.Object:
    """A new object holding the result mesh, with the source's transform, materials and collections.

    record : vertices (n, 3) world units, faces (m, 3), vertex_values {name: (n,)}, metrics,
        node_id. Distortions ("stretch", "bend") become colour attributes; other values FLOAT
        attributes `isoclay_<name>`. The source is hidden unless `keep_source_visible`.
    """
    matrix = mesh_io.matrix_to_numpy(source.matrix_world)
    world = np.asarray(field_of(record, "vertices"), dtype=np.float64)
    faces = np.asarray(field_of(record, "faces"), dtype=np.int64)
    local = mesh_io.to_local(world, matrix)
    name = f"{source.name} {task}"
    mesh = mesh_io.build_mesh(name, local, faces)
    try:
        for value_name, values in (field_of(record, "vertex_values") or {}).items():
            if value_name in DISTORTIONS:
                mesh_io.write_distortion(mesh, value_name, np.asarray(values))
            else:
                mesh_io.write_point_floats(mesh, f"isoclay_{value_name}", np.asarray(values))
        for name_ in DISTORTIONS:
            if name_ in mesh.color_attributes:
                mesh.color_attributes.active_color_name = name_
                mesh.color_attributes.render_color_index = mesh.color_attributes.active_color_index
                break
        if source.type == 'MESH':
            for material in source.data.materials:
                mesh.materials.append(material)
        mesh.shade_smooth()
    except Exception:
        bpy.data.meshes.remove(mesh)
        raise
    obj = bpy.data.objects.new(name, mesh)
    collections = list(source.users_collection) or [context.scene.collection]
    for coll in collections:
        coll.objects.link(obj)
    obj.matrix_world = source.matrix_world.copy()
    props = obj.isoclay
    props.source_key = ensure_source_key(source)
    props.node_id = str(field_of(record, "node_id") or "")
    props.base_node = props.node_id
    props.task = task
    props.geometry_hash = mesh_io.geometry_hash(mesh_io.read_positions(mesh), faces, matrix)
    metrics = _plain(dict(field_of(record, "metrics") or {}))
    if metrics:
        obj["isoclay_metrics"] = metrics
    if not keep_source_visible:
        source.hide_set(True)
    for other in context.view_layer.objects.selected:
        other.select_set(False)
    obj.select_set(True)
    context.view_layer.objects.active = obj
    return obj


def node_for_edit(obj: bpy.types.Object, local: np.ndarray, faces: np.ndarray) -> str | None:
    """The history node the next edit of `obj` may start from, or None when its geometry has changed.

    An object made from a solver result (or set by "edit from here") starts from that node only
    while its evaluated surface and transform are exactly what the solver produced.
    """
    props = obj.isoclay
    if not props.base_node or not props.geometry_hash:
        return None
    matrix = mesh_io.matrix_to_numpy(obj.matrix_world)
    return props.base_node if mesh_io.geometry_hash(local, faces, matrix) == props.geometry_hash else None
