"""Turning a solver result into a Blender object next to its source."""

from __future__ import annotations

import bpy
import numpy as np

from . import mesh_io, transfer
from .mesh_io import read_positions
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


def _report_params(record) -> dict:
    report = field_of(record, "report") or {}
    params = report.get("params") if isinstance(report, dict) else None
    return params if isinstance(params, dict) else {}


def is_keep_topology(record, source: bpy.types.Object) -> bool:
    """True when the result is the source's own vertices moved (keep topology on the same vertex count)."""
    return (source.type == 'MESH' and bool(_report_params(record).get("keep_topology"))
            and len(field_of(record, "vertices")) == len(source.data.vertices))


def _moved_copy(source: bpy.types.Object, name: str, local: np.ndarray, sent: np.ndarray | None) -> tuple:
    """A copy of the source's mesh datablock with only positions written; returns (mesh, notes).

    local : (n, 3) result positions in the source's space; sent : (n, 3) the positions that were
    sent (the evaluated mesh), or None for the datablock's own. Shape keys: every key moves by the
    edit's displacement (result - sent), so the basis takes the new shape and the other keys keep
    their offsets from it. Custom split normals belong to the old shape and are dropped.
    """
    notes = []
    mesh = source.data.copy()
    mesh.name = name
    old = read_positions(mesh).astype(np.float64)
    shift = local - (old if sent is None else np.asarray(sent, dtype=np.float64))
    keys = mesh.shape_keys
    if keys is not None:
        for block in keys.key_blocks:
            co = np.empty(len(mesh.vertices) * 3, dtype=np.float32)
            block.data.foreach_get("co", co)
            block.data.foreach_set("co", (co.reshape(-1, 3) + shift).astype(np.float32).ravel())
        if any(m.show_viewport for m in source.modifiers):
            notes.append("shape keys were moved by the edit's displacement; the source's modifiers are not on the result")
    mesh.attributes["position"].data.foreach_set("vector", (old + shift).astype(np.float32).ravel())
    if mesh.has_custom_normals:
        normals = mesh.attributes.get("custom_normal")
        if normals is not None:
            mesh.attributes.remove(normals)
        notes.append("custom split normals were dropped (they belonged to the old shape): shading is recomputed")
    handles_attr = mesh.attributes.get("isoclay_handle")
    if handles_attr is not None:  # the source's handles and their empties stay with the source
        mesh.attributes.remove(handles_attr)
    mesh.update()
    return mesh, notes


def create_result_object(context, source: bpy.types.Object, record, task: str,
                         keep_source_visible: bool = False, sent_local: np.ndarray | None = None):
    """A new object holding the result, with the source's transform, materials and collections.

    record : vertices (n, 3) world units, faces (m, 3), vertex_values {name: (n,)}, metrics,
        node_id, report, source_face / source_bary (correspondence). Keep-topology results are a
        copy of the source's mesh datablock with new positions (faces, UVs, materials, groups,
        attributes, shape keys kept); rebuilt results get the source's UVs, materials, colours and
        vertex groups through the correspondence (transfer.py). Distortions ("stretch", "bend")
        become colour attributes; other values FLOAT attributes `isoclay_<name>`. The source is
        hidden unless `keep_source_visible`.
    sent_local : (n, 3) local positions that were sent (the evaluated mesh), when known.
    Returns the object; its "isoclay_notes" custom property lists what could not be kept.
    """
    matrix = mesh_io.matrix_to_numpy(source.matrix_world)
    world = np.asarray(field_of(record, "vertices"), dtype=np.float64)
    faces = np.asarray(field_of(record, "faces"), dtype=np.int64)
    local = mesh_io.to_local(world, matrix)
    name = f"{source.name} {task}"
    values = field_of(record, "vertex_values") or {}
    notes, carried = [], None
    keep = is_keep_topology(record, source)
    if keep:
        mesh, notes = _moved_copy(source, name, local, sent_local)
    else:
        mesh = mesh_io.build_mesh(name, local, faces)
    try:
        if not keep and source.type == 'MESH':
            for material in source.data.materials:
                mesh.materials.append(material)
            carried = _carry(context, source, record, mesh, faces, set(values) & set(DISTORTIONS), sent_local)
            notes += list(carried.notes)
        for value_name, array in values.items():
            if value_name in DISTORTIONS:
                mesh_io.write_distortion(mesh, value_name, np.asarray(array))
            else:
                mesh_io.write_point_floats(mesh, f"isoclay_{value_name}", np.asarray(array))
        for name_ in DISTORTIONS:
            if name_ in mesh.color_attributes:
                mesh.color_attributes.active_color_name = name_
                mesh.color_attributes.render_color_index = mesh.color_attributes.active_color_index
                break
        if not keep:
            mesh.shade_smooth()
    except Exception:
        bpy.data.meshes.remove(mesh)
        raise
    obj = bpy.data.objects.new(name, mesh)
    collections = list(source.users_collection) or [context.scene.collection]
    for coll in collections:
        coll.objects.link(obj)
    obj.matrix_world = source.matrix_world.copy()
    if keep:
        for group in source.vertex_groups:  # names live on the object; the weights came with the mesh copy
            if group.name not in obj.vertex_groups:
                obj.vertex_groups.new(name=group.name)
    elif carried is not None and carried.group_names:
        transfer.write_vertex_groups(obj, list(carried.group_names), carried.group_weights)
    props = obj.isoclay
    props.source_key = ensure_source_key(source)
    props.node_id = str(field_of(record, "node_id") or "")
    props.base_node = props.node_id
    props.task = task
    props.geometry_hash = mesh_io.geometry_hash(mesh_io.read_positions(mesh), mesh_io.read_triangles(mesh), matrix)
    metrics = _plain(dict(field_of(record, "metrics") or {}))
    if metrics:
        obj["isoclay_metrics"] = metrics
    obj["isoclay_notes"] = list(notes)
    if not keep_source_visible:
        source.hide_set(True)
    for other in context.view_layer.objects.selected:
        other.select_set(False)
    obj.select_set(True)
    context.view_layer.objects.active = obj
    return obj


def _carry(context, source, record, mesh, faces, skip, sent_local) -> "transfer.Carried":
    """The source's surface data onto a rebuilt `mesh` through the record's correspondence."""
    face, bary = field_of(record, "source_face"), field_of(record, "source_bary")
    if face is None or bary is None:
        return transfer.Carried(("this result carries no correspondence (made by an older solver): UVs, materials "
                                 "and colours were not carried over",))
    depsgraph = context.evaluated_depsgraph_get()
    evaluated = source.evaluated_get(depsgraph)
    source_mesh = evaluated.to_mesh(preserve_all_data_layers=True, depsgraph=depsgraph)
    try:
        given = (field_of(record, "report") or {}).get("input") or {}
        surface = transfer.source_surface(source_mesh)
        same = (len(source_mesh.vertices) == given.get("vertices", len(source_mesh.vertices))
                and len(surface.tri_verts) == given.get("faces", len(surface.tri_verts)))
        if sent_local is not None and len(sent_local) == len(source_mesh.vertices):
            surface = transfer.SourceSurface(np.asarray(sent_local, np.float64), surface.tri_verts,
                                             surface.tri_loops, surface.tri_poly)
        if not same:
            return transfer.Carried(("the source has changed since this edit: its UVs, materials and colours were "
                                     "not carried over",))
        return transfer.carry_surface_data(source, source_mesh, surface, mesh, faces, np.asarray(face),
                                           np.asarray(bary), skip | {"stretch", "bend"})
    finally:
        evaluated.to_mesh_clear()


def show_distortion(context, obj: bpy.types.Object, kind: str) -> None:
    """Show `kind` ("stretch", "bend" or "none") as the object's colours, and colours in solid views."""
    if obj is None or obj.type != 'MESH':
        return
    colours = obj.data.color_attributes
    if kind in colours:
        colours.active_color_name = kind
        colours.render_color_index = colours.active_color_index
    elif kind == "none":
        other = [a.name for a in colours if a.name not in DISTORTIONS]
        if other:
            colours.active_color_name = other[0]
    screen = getattr(context, "screen", None)
    for area in (screen.areas if screen else ()):
        if area.type == 'VIEW_3D':
            for space in area.spaces:
                if space.type == 'VIEW_3D' and space.shading.type == 'SOLID':
                    space.shading.color_type = 'ATTRIBUTE' if kind in DISTORTIONS else 'MATERIAL'
            area.tag_redraw()


def distortion_legend(obj) -> dict | None:
    """{"kind", "low", "high", "max", "above"} for the panel's legend, or None when the object has no distortion.

    low/high: the values drawn at the dark and bright ends of the colour map; above: share of
    vertices beyond `high` (drawn at the bright end).
    """
    if obj is None or obj.type != 'MESH' or obj.isoclay.distortion_view not in DISTORTIONS:
        return None
    kind = obj.isoclay.distortion_view
    mesh = obj.data
    if f"isoclay_{kind}_scale" not in mesh:
        return None
    high = float(mesh[f"isoclay_{kind}_scale"])
    return {"kind": kind, "low": 0.0, "high": high, "max": float(mesh.get(f"isoclay_{kind}_max", high)),
            "above": 0.05}


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
