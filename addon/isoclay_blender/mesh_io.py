"""Moving meshes between Blender and numpy fast: position and corner attributes via foreach_get/set.

vertices are (n, 3) float64 in world units on the numpy side; Blender stores float32 positions.
"""

from __future__ import annotations

import hashlib

import bpy
import numpy as np

from .colours import ramp_srgb, srgb_to_linear


class MeshReadError(Exception):
    """The object cannot be sent to the solver; the message names it and says what to do."""


def matrix_to_numpy(matrix) -> np.ndarray:
    """(4, 4) float64 from a mathutils.Matrix."""
    return np.array([list(row) for row in matrix], dtype=np.float64)


def read_positions(mesh: bpy.types.Mesh) -> np.ndarray:
    """(n, 3) float32 local positions, read through the position attribute."""
    out = np.empty(len(mesh.vertices) * 3, dtype=np.float32)
    mesh.attributes["position"].data.foreach_get("vector", out)
    return out.reshape(-1, 3)


def read_corner_verts(mesh: bpy.types.Mesh) -> np.ndarray:
    """(L,) int32 vertex of each face corner (loop)."""
    buf = np.empty(len(mesh.loops), dtype=np.int32)
    if len(buf):
        mesh.attributes[".corner_vert"].data.foreach_get("value", buf)
    return buf


def read_corner_edges(mesh: bpy.types.Mesh) -> np.ndarray:
    """(L,) int32 edge leaving each face corner (loop)."""
    buf = np.empty(len(mesh.loops), dtype=np.int32)
    if len(buf):
        mesh.attributes[".corner_edge"].data.foreach_get("value", buf)
    return buf


def read_corner_triangles(mesh: bpy.types.Mesh) -> tuple[np.ndarray, np.ndarray]:
    """(m, 3) int64 corners (loops) of each triangle and (m,) int64 face each came from.

    n-gons are split the way Blender draws them (loop triangles); a mesh of triangles only is read
    straight from its corners (face t has corners 3t..3t+2: Blender keeps faces in corner order).
    """
    corners = len(mesh.loops)
    if len(mesh.polygons) == 0:
        return np.zeros((0, 3), dtype=np.int64), np.zeros(0, dtype=np.int64)
    if corners == 3 * len(mesh.polygons):  # every face is a triangle (each face has >= 3 corners)
        return np.arange(corners, dtype=np.int64).reshape(-1, 3), np.arange(len(mesh.polygons), dtype=np.int64)
    mesh.calc_loop_triangles()
    loops = np.empty(len(mesh.loop_triangles) * 3, dtype=np.int32)
    mesh.loop_triangles.foreach_get("loops", loops)
    poly = np.empty(len(mesh.loop_triangles), dtype=np.int32)
    mesh.loop_triangles.foreach_get("polygon_index", poly)
    return loops.reshape(-1, 3).astype(np.int64), poly.astype(np.int64)


def read_triangles(mesh: bpy.types.Mesh) -> np.ndarray:
    """(m, 3) int64 vertex indices; n-gons are split the way Blender draws them (read_corner_triangles)."""
    loops, _ = read_corner_triangles(mesh)
    return read_corner_verts(mesh)[loops].astype(np.int64)


def to_world(local: np.ndarray, matrix: np.ndarray) -> np.ndarray:
    """(n, 3) float64 world positions from local ones and a (4, 4) object matrix."""
    return local.astype(np.float64) @ matrix[:3, :3].T + matrix[:3, 3]


def to_local(world: np.ndarray, matrix: np.ndarray) -> np.ndarray:
    """Inverse of to_world; raises MeshReadError for a matrix with zero scale."""
    if abs(np.linalg.det(matrix[:3, :3])) < 1e-30:
        raise MeshReadError("the object's scale is zero on some axis: apply or fix its scale first")
    inv = np.linalg.inv(matrix)
    return world @ inv[:3, :3].T + inv[:3, 3]


def read_local_mesh(obj: bpy.types.Object, depsgraph) -> tuple[np.ndarray, np.ndarray]:
    """The evaluated mesh (modifiers applied) of `obj` in its own space: (n, 3) float32, (m, 3) int64."""
    if obj is None or obj.type != 'MESH':
        raise MeshReadError(f"{getattr(obj, 'name', 'nothing')!r} is not a mesh object: select a mesh")
    evaluated = obj.evaluated_get(depsgraph)
    mesh = evaluated.to_mesh()
    try:
        local = read_positions(mesh)
        faces = read_triangles(mesh)
    finally:
        evaluated.to_mesh_clear()
    if len(faces) == 0:
        raise MeshReadError(f"{obj.name!r} has no faces: the solver needs a surface, not loose vertices or edges")
    if not np.isfinite(local).all():
        raise MeshReadError(f"{obj.name!r} has vertices at infinite or undefined positions: fix them first")
    return local, faces


def read_world_mesh(obj: bpy.types.Object, depsgraph) -> tuple[np.ndarray, np.ndarray]:
    """The evaluated mesh of `obj` in world units: (n, 3) float64, (m, 3) int64."""
    local, faces = read_local_mesh(obj, depsgraph)
    return to_world(local, matrix_to_numpy(obj.matrix_world)), faces


def geometry_hash(local: np.ndarray, faces: np.ndarray, matrix: np.ndarray) -> str:
    """A content hash of float32 local positions, int32 faces and the float64 object matrix.

    Equal hashes mean the world-space surface is exactly what the solver produced, so an edit can
    start from that history entry without refitting.
    """
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(local, dtype=np.float32).tobytes())
    h.update(np.ascontiguousarray(faces, dtype=np.int32).tobytes())
    h.update(np.ascontiguousarray(matrix, dtype=np.float64).tobytes())
    return h.hexdigest()


def build_mesh(name: str, vertices: np.ndarray, faces: np.ndarray) -> bpy.types.Mesh:
    """A new mesh datablock from (n, 3) positions (stored as float32) and (m, 3) triangles."""
    vertices = np.asarray(vertices)
    faces = np.asarray(faces)
    if vertices.ndim != 2 or vertices.shape[1] != 3 or faces.ndim != 2 or faces.shape[1] != 3:
        raise MeshReadError(f"result arrays have shapes {vertices.shape} and {faces.shape}, expected (n, 3) and (m, 3): the solver sent a malformed mesh")
    if len(faces) and (faces.min() < 0 or faces.max() >= len(vertices)):
        raise MeshReadError("result faces point at missing vertices: the solver sent a malformed mesh")
    n, m = len(vertices), len(faces)
    mesh = bpy.data.meshes.new(name)
    mesh.vertices.add(n)
    mesh.loops.add(3 * m)
    mesh.polygons.add(m)
    mesh.attributes["position"].data.foreach_set("vector", np.ascontiguousarray(vertices, dtype=np.float32).ravel())
    mesh.polygons.foreach_set("loop_start", np.arange(0, 3 * m, 3, dtype=np.int32))
    mesh.attributes[".corner_vert"].data.foreach_set("value", np.ascontiguousarray(faces, dtype=np.int32).ravel())
    mesh.update(calc_edges=True)
    return mesh


def write_point_floats(mesh: bpy.types.Mesh, name: str, values: np.ndarray) -> None:
    """Store (n,) values as a FLOAT point attribute `name` (replacing one of that name)."""
    old = mesh.attributes.get(name)
    if old is not None:
        mesh.attributes.remove(old)
    attr = mesh.attributes.new(name, 'FLOAT', 'POINT')
    attr.data.foreach_set("value", np.ascontiguousarray(values, dtype=np.float32))


def distortion_colors(values: np.ndarray, scale: float) -> np.ndarray:
    """(n, 4) float32 linear RGBA: 0 maps to the dark end, `scale` and above to the bright end."""
    t = np.clip(np.nan_to_num(values, nan=0.0) / max(scale, 1e-12), 0.0, 1.0)
    rgb = srgb_to_linear(ramp_srgb(t))
    return np.concatenate([rgb, np.ones((len(t), 1))], axis=1).astype(np.float32)


def write_distortion(mesh: bpy.types.Mesh, name: str, values: np.ndarray) -> float:
    """Store raw values as FLOAT `isoclay_<name>` and colours as colour attribute `<name>`.

    The colour scale is the 95th percentile of the values (robust to a few spikes); returned and kept
    on the mesh as custom property `isoclay_<name>_scale` so the panel can say what red means.
    """
    values = np.asarray(values, dtype=np.float64)
    if values.shape != (len(mesh.vertices),):
        raise MeshReadError(f"distortion {name!r} has {values.size} values for {len(mesh.vertices)} vertices: the solver sent a malformed result")
    write_point_floats(mesh, f"isoclay_{name}", values)
    finite = values[np.isfinite(values)]
    scale = float(np.percentile(finite, 95)) if finite.size else 0.0
    old = mesh.color_attributes.get(name)
    if old is not None:
        mesh.color_attributes.remove(old)
    colours = mesh.color_attributes.new(name, 'FLOAT_COLOR', 'POINT')
    colours.data.foreach_set("color", distortion_colors(values, scale).ravel())
    mesh[f"isoclay_{name}_scale"] = scale
    mesh[f"isoclay_{name}_max"] = float(finite.max()) if finite.size else 0.0
    return scale
