"""Handles and their target empties.

(Scenes that give every handle vertex its own empty are read too: see vertex_empties.)

A handle is a group of mesh vertices marked in the INT point attribute `isoclay_handle` (group
number, 0 = not a handle), so it is saved with the .blend and follows undo. Each group has one
empty (its target) parented to the object, in the collection "<object> targets". The empty's rest
pose, in the object's space, is kept on it; the group's targets are its vertices carried by the
empty's motion since then:

    target = M_obj @ L_now @ inverse(L_rest) @ vertex_local,   L = inverse(M_obj) @ M_empty

so moving, rotating or scaling the empty moves, turns or scales the group, and an untouched
empty keeps its vertices exactly where they are.
"""

from __future__ import annotations

import bpy
import numpy as np

from .mesh_io import matrix_to_numpy, read_positions, to_world

ATTRIBUTE = "isoclay_handle"
PARENT_COLLECTION = "Isoclay targets"


class HandleError(Exception):
    """A handle operation cannot be done; the message says why and what to do."""


def handle_groups(mesh: bpy.types.Mesh) -> np.ndarray:
    """(n,) int32 group per vertex (0 = none); zeros if the mesh has no handles.

    A BOOLEAN attribute of the same name is read as group 1 for every marked vertex.
    """
    attr = mesh.attributes.get(ATTRIBUTE)
    n = len(mesh.vertices)
    if attr is None or attr.domain != 'POINT':
        return np.zeros(n, dtype=np.int32)
    if attr.data_type == 'BOOLEAN':
        buf = np.zeros(n, dtype=bool)
        attr.data.foreach_get("value", buf)
        return buf.astype(np.int32)
    if attr.data_type != 'INT':
        return np.zeros(n, dtype=np.int32)
    buf = np.zeros(n, dtype=np.int32)
    attr.data.foreach_get("value", buf)
    return buf


def _write_groups(mesh: bpy.types.Mesh, groups: np.ndarray) -> None:
    attr = mesh.attributes.get(ATTRIBUTE)
    if attr is not None and (attr.data_type != 'INT' or attr.domain != 'POINT'):
        mesh.attributes.remove(attr)
        attr = None
    if not groups.any():
        if attr is not None:
            mesh.attributes.remove(attr)
        return
    if attr is None:
        attr = mesh.attributes.new(ATTRIBUTE, 'INT', 'POINT')
    attr.data.foreach_set("value", np.ascontiguousarray(groups, dtype=np.int32))
    mesh.update()


class _ObjectMode:
    """Leave Edit Mode for the duration (so mesh data, not the edit mesh, is current), then return."""

    def __init__(self, obj):
        self.obj = obj
        self.was_edit = obj.mode == 'EDIT'

    def __enter__(self):
        if self.was_edit:
            bpy.ops.object.mode_set(mode='OBJECT')
        return self

    def __exit__(self, *exc):
        if self.was_edit:
            bpy.ops.object.mode_set(mode='EDIT')
        return False


def selected_vertices(obj: bpy.types.Object) -> np.ndarray:
    """(k,) indices of the vertices selected in Edit Mode (synced from the edit mesh first)."""
    if obj.mode == 'EDIT':
        obj.update_from_editmode()
    mesh = obj.data
    buf = np.zeros(len(mesh.vertices), dtype=bool)
    mesh.vertices.foreach_get("select", buf)
    return np.flatnonzero(buf)


def target_empties(obj: bpy.types.Object) -> dict[int, bpy.types.Object]:
    """Group number -> target empty of `obj`."""
    found = {}
    for other in bpy.data.objects:
        props = getattr(other, "isoclay", None)
        if props is not None and props.is_target and props.target_source == obj:
            found[int(props.target_group)] = other
    return found


def target_collection(context, obj: bpy.types.Object) -> bpy.types.Collection:
    """The collection holding `obj`'s empties, created (under "Isoclay targets") when missing."""
    name = f"{obj.name} targets"
    coll = bpy.data.collections.get(name)
    if coll is None:
        coll = bpy.data.collections.new(name)
    parent = bpy.data.collections.get(PARENT_COLLECTION)
    if parent is None:
        parent = bpy.data.collections.new(PARENT_COLLECTION)
    if parent.name not in context.scene.collection.children:
        context.scene.collection.children.link(parent)
    if coll.name not in parent.children:
        parent.children.link(coll)
    return coll


def _object_space(obj, empty) -> np.ndarray:
    return np.linalg.inv(matrix_to_numpy(obj.matrix_world)) @ matrix_to_numpy(empty.matrix_world)


def add_handles(context, obj: bpy.types.Object) -> int:
    """Make the selected vertices one new handle group with its empty; returns the group number."""
    if obj is None or obj.type != 'MESH':
        raise HandleError("select a mesh object to add handles to")
    with _ObjectMode(obj):
        selected = selected_vertices(obj)
        if selected.size == 0:
            raise HandleError("no vertices selected: select the vertices to pull in Edit Mode, then add a handle")
        mesh = obj.data
        groups = handle_groups(mesh)
        group = int(groups.max()) + 1 if groups.size else 1
        groups[selected] = group
        _write_groups(mesh, groups)
        positions = read_positions(mesh)
    centre = positions[selected].astype(np.float64).mean(axis=0)
    extent = float(np.ptp(positions, axis=0).max())
    empty = bpy.data.objects.new(f"{obj.name} target {group}", None)
    empty.empty_display_type = 'SPHERE'
    empty.empty_display_size = max(extent * 0.04, 1e-4)
    empty.show_in_front = True
    target_collection(context, obj).objects.link(empty)
    empty.parent = obj
    empty.matrix_parent_inverse.identity()
    empty.location = centre
    empty.isoclay.is_target = True
    empty.isoclay.target_source = obj
    empty.isoclay.target_group = group
    context.view_layer.update()
    empty.isoclay.target_rest = [float(x) for x in _object_space(obj, empty).ravel()]
    return group


def remove_handles(context, obj: bpy.types.Object) -> int:
    """Unmark the selected vertices; delete empties whose group became empty. Returns vertices unmarked."""
    with _ObjectMode(obj):
        selected = selected_vertices(obj)
        groups = handle_groups(obj.data)
        hit = selected[groups[selected] > 0]
        if hit.size == 0:
            raise HandleError("none of the selected vertices is a handle: select handle vertices to remove")
        groups[hit] = 0
        _write_groups(obj.data, groups)
    left = set(np.unique(groups).tolist())
    for group, empty in target_empties(obj).items():
        if group not in left:
            bpy.data.objects.remove(empty)
    for index, empty in vertex_empties(obj).items():
        if 0 <= index < len(groups) and groups[index] == 0:
            bpy.data.objects.remove(empty)
    return int(hit.size)


def clear_handles(context, obj: bpy.types.Object) -> int:
    """Remove every handle of `obj` and its empties (and the empty collection). Returns groups removed."""
    empties = {**{("group", g): e for g, e in target_empties(obj).items()},
               **{("vertex", i): e for i, e in vertex_empties(obj).items()}}
    with _ObjectMode(obj):
        _write_groups(obj.data, np.zeros(len(obj.data.vertices), dtype=np.int32))
    for empty in empties.values():
        bpy.data.objects.remove(empty)
    coll = bpy.data.collections.get(f"{obj.name} targets")
    if coll is not None and not coll.objects:
        bpy.data.collections.remove(coll)
    return len(empties)


def vertex_empties(obj: bpy.types.Object) -> dict[int, bpy.types.Object]:
    """Vertex index -> empty, for scenes that give each handle vertex its own empty.

    That convention (used by the workshop demo scene): empties in "<object> targets" carrying a
    custom property "isoclay_vertex"; the empty's world location is the vertex's target.
    """
    coll = bpy.data.collections.get(f"{obj.name} targets")
    found = {}
    for empty in (coll.objects if coll is not None else ()):
        if "isoclay_vertex" in empty.keys():
            found[int(empty["isoclay_vertex"])] = empty
    return found


def _per_vertex_targets(obj, groups, local, m_obj):
    """(idx (k,), handles (k, 3), targets (k, 3)) world units of the vertices with their own empty;
    an empty left on its vertex (up to float32 storage) holds that vertex exactly still."""
    per_vertex = {i: e for i, e in vertex_empties(obj).items() if 0 <= i < len(local) and groups[i] > 0}
    idx = np.array(sorted(per_vertex), dtype=np.int64)
    handle = to_world(local[idx], m_obj)
    target = np.array([list(per_vertex[i].matrix_world.translation) for i in idx], dtype=np.float64).reshape(-1, 3)
    still = np.linalg.norm(target - handle, axis=1) <= 1e-6 * np.maximum(1.0, np.linalg.norm(handle, axis=1))
    target[still] = handle[still]
    return idx, handle, target


def _group_motion(obj, groups, group: int) -> tuple[np.ndarray, bpy.types.Object]:
    """(object-space motion (4, 4) of group's empty since its rest pose, exactly the identity when
    untouched; the empty). Raises HandleError when the group lost its empty."""
    empty = target_empties(obj).get(int(group))
    if empty is None:
        raise HandleError(f"handle {group} of {obj.name!r} has lost its target empty: clear the handles and add them again")
    rest = np.array(empty.isoclay.target_rest, dtype=np.float64).reshape(4, 4)
    motion = _object_space(obj, empty) @ np.linalg.inv(rest)
    return (np.eye(4) if np.allclose(motion, np.eye(4), rtol=0.0, atol=1e-9) else motion), empty


def _marked(obj):
    groups = handle_groups(obj.data)
    marked = np.flatnonzero(groups)
    if marked.size == 0:
        raise HandleError(f"{obj.name!r} has no handles: select vertices in Edit Mode and add a handle first")
    return groups, marked, read_positions(obj.data).astype(np.float64), matrix_to_numpy(obj.matrix_world)


def handles_and_targets(obj: bpy.types.Object) -> tuple[np.ndarray, np.ndarray]:
    """(k, 3) handle positions and (k, 3) targets in world units, from the original (unmodified) mesh.

    Vertices with their own empty (see vertex_empties) come first, in vertex order; then each
    handle group in group order. Raises HandleError when a group has lost its empty.
    """
    groups, marked, local, m_obj = _marked(obj)
    idx, handle, target = _per_vertex_targets(obj, groups, local, m_obj)
    handles_out, targets_out = [handle], [target]
    marked = marked[~np.isin(marked, idx)]
    for group in np.unique(groups[marked]):
        members = marked[groups[marked] == group]
        motion, _ = _group_motion(obj, groups, group)
        handle = to_world(local[members], m_obj)
        moved = not np.array_equal(motion, np.eye(4))
        targets_out.append(to_world(local[members] @ motion[:3, :3].T + motion[:3, 3], m_obj) if moved else handle.copy())
        handles_out.append(handle)
    return np.concatenate(handles_out), np.concatenate(targets_out)


def handle_summary(obj: bpy.types.Object) -> tuple[int, int, int]:
    """(handles, vertices, targets moved) for the panel; a per-vertex empty counts as one handle."""
    if obj is None or obj.type != 'MESH':
        return 0, 0, 0
    groups = handle_groups(obj.data)
    per_vertex = {i: e for i, e in vertex_empties(obj).items() if 0 <= i < len(groups) and groups[i] > 0}
    rest_groups = groups.copy()
    rest_groups[list(per_vertex)] = 0
    ids = [g for g in np.unique(rest_groups) if g > 0]
    moved = 0
    for group, empty in target_empties(obj).items():
        rest = np.array(empty.isoclay.target_rest, dtype=np.float64).reshape(4, 4)
        if not np.allclose(_object_space(obj, empty), rest, rtol=0.0, atol=1e-9):
            moved += 1
    if per_vertex:
        local = read_positions(obj.data).astype(np.float64)
        idx = np.array(sorted(per_vertex))
        handle = to_world(local[idx], matrix_to_numpy(obj.matrix_world))
        target = np.array([list(per_vertex[i].matrix_world.translation) for i in idx])
        moved += int((np.linalg.norm(target - handle, axis=1) > 1e-6 * np.maximum(1.0, np.linalg.norm(handle, axis=1))).sum())
    return len(ids) + len(per_vertex), int((groups > 0).sum()), moved


#: Handle groups one request can carry: the wire allows 64 array frames (wire.MAX_ARRAYS), two of
#: which are the mesh.
MAX_GROUPS = 62


def handle_groups_world(obj: bpy.types.Object) -> list[dict]:
    """The object's handles as groups for the solver: [{"points": (k, 3) float64 world, "transform": (4, 4)
    world motion of the group's target, "name": str}, ...] (CONTRACTS 1, group form).

    A group with a target empty moves by T = M_obj @ L_now @ inverse(L_rest) @ inverse(M_obj), so
    target = T @ point; an untouched empty gives exactly the identity. Vertices with their own empty
    (vertex_empties) become groups too, one per distinct move (all held ones in one group). Raises
    HandleError when there are no handles, a group lost its empty, or there are too many groups.
    """
    groups, marked, local, m_obj = _marked(obj)
    out = []
    idx, handle, target = _per_vertex_targets(obj, groups, local, m_obj)
    if len(idx):
        moves, which = np.unique(target - handle, axis=0, return_inverse=True)
        which = which.ravel()
        for k, shift in enumerate(moves):
            transform = np.eye(4)
            transform[:3, 3] = shift
            name = "held vertices" if not shift.any() else f"vertex {int(idx[which == k][0])}"
            out.append({"points": handle[which == k], "transform": transform, "name": name})
    marked = marked[~np.isin(marked, idx)]
    inv_obj = np.linalg.inv(m_obj)
    for group in np.unique(groups[marked]):
        members = marked[groups[marked] == group]
        motion, empty = _group_motion(obj, groups, group)
        transform = np.eye(4) if np.array_equal(motion, np.eye(4)) else m_obj @ motion @ inv_obj
        out.append({"points": to_world(local[members], m_obj), "transform": transform, "name": empty.name})
    if len(out) > MAX_GROUPS:
        raise HandleError(f"{obj.name!r} has {len(out)} handle groups; one edit takes at most {MAX_GROUPS}: "
                          "clear some handles and group vertices that move together")
    return out


def deform_request(obj: bpy.types.Object) -> tuple[list[dict], dict[str, np.ndarray]]:
    """(params["groups"], array frames {"handles:<i>": points}) for a deform of `obj` (see handle_groups_world)."""
    groups = handle_groups_world(obj)
    params = [{"transform": g["transform"].tolist(), "name": g["name"][:64]} for g in groups]
    return params, {f"handles:{i}": np.ascontiguousarray(g["points"], dtype=np.float64) for i, g in enumerate(groups)}
