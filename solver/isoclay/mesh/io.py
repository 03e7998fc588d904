"""Read and write PLY, OBJ, STL and glTF meshes: through trimesh, or numpy alone for plain binary PLY."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

import numpy as np

from ..errors import InvalidInput, InvalidMesh
from .types import TriangleMesh

#: File extensions isoclay reads and writes, and trimesh's name for each.
FORMATS = {".ply": "ply", ".obj": "obj", ".stl": "stl", ".glb": "glb", ".gltf": "gltf"}

# PLY type names the fast path accepts (Turk 1994 names plus the sized aliases trimesh also
# reads), as numpy kinds; the byte order comes from the format line.
_PLY_FLOATS = {"float": "f4", "float32": "f4", "double": "f8", "float64": "f8"}
_PLY_COUNTS = {"uchar": "u1", "uint8": "u1", "char": "i1", "int8": "i1", "ushort": "u2", "uint16": "u2",
               "short": "i2", "int16": "i2", "uint": "u4", "uint32": "u4", "int": "i4", "int32": "i4"}
_PLY_INDICES = {"int": "i4", "int32": "i4", "uint": "u4", "uint32": "u4"}
_PLY_BYTE_ORDER = {"binary_little_endian": "<", "binary_big_endian": ">"}
_PLY_FACE_LISTS = ("vertex_indices", "vertex_index")
#: Header size past which a file is left to trimesh: a positions-and-triangles header is ~200 bytes.
_PLY_MAX_HEADER = 64 * 1024
#: Vertex properties that are geometry or colour, not isoclay's per-vertex values.
_NOT_VERTEX_VALUES = {"x", "y", "z", "red", "green", "blue", "alpha", "nx", "ny", "nz"}


def _format_of(path: Path) -> str:
    fmt = FORMATS.get(path.suffix.lower())
    if fmt is None:
        raise InvalidInput(
            f"{path.name}: unsupported file type {path.suffix or '(none)'}; use one of {', '.join(FORMATS)}"
        )
    return fmt


def read_mesh(path: str | os.PathLike) -> TriangleMesh:
    """Load a triangle mesh; several objects in one file are merged into one mesh.

    Vertices keep their order and duplicates (no merging), so a result written with the
    original topology lines up with the input vertex for vertex. A binary PLY of positions
    and triangles only is read without trimesh and has source None.
    """
    path = Path(path)
    fmt = _format_of(path)
    if not path.is_file():
        raise InvalidInput(f"{path}: no such file")
    if path.stat().st_size == 0:
        raise InvalidMesh(f"{path.name} is an empty file: export the mesh again")
    if fmt == "ply":
        plain = _read_binary_triangles(path, extra_floats=False)
        if plain is not None:
            records, faces = plain
            vertices = np.empty((len(records), 3), dtype=np.float64)
            for i, axis in enumerate("xyz"):
                vertices[:, i] = records[axis]
            return TriangleMesh(vertices, faces, {}, None)

    import trimesh

    try:
        loaded = trimesh.load(str(path), file_type=fmt, process=False)
        if isinstance(loaded, trimesh.Scene):  # glTF/OBJ with several objects: merge in world space
            parts = [g for g in loaded.dump(concatenate=False) if isinstance(g, trimesh.Trimesh)]
            loaded = trimesh.util.concatenate(parts) if parts else loaded
    except Exception as exc:  # trimesh raises many types for corrupt files
        raise InvalidMesh(f"{path.name} could not be read as {fmt.upper()} ({type(exc).__name__}: {exc}): re-export it") from None
    if isinstance(loaded, trimesh.PointCloud):
        raise InvalidMesh(f"{path.name} has no faces ({len(loaded.vertices)} loose points): isoclay needs a surface, not a point cloud")
    if not isinstance(loaded, trimesh.Trimesh):
        raise InvalidMesh(f"{path.name} holds no triangle mesh (found {type(loaded).__name__})")
    vertices = np.array(loaded.vertices, dtype=np.float64)
    faces = np.array(loaded.faces, dtype=np.int64).reshape(-1, 3)
    return TriangleMesh(vertices, faces, {}, loaded)


def write_mesh(path: str | os.PathLike, mesh: TriangleMesh, keep_source: bool = False) -> None:
    """Write a mesh by extension; per-vertex values go into PLY as extra float properties.

    keep_source : reuse the source object's visuals (UVs, materials) with the new positions,
        valid only when the faces are the source's own.
    The file is written to a temporary name and renamed, so a failed write loses nothing.
    A PLY without a source to reuse is written with numpy, in the layout trimesh's exporter
    uses (float32 positions, float32 values, uchar count + int32 indices).
    """
    path = Path(path)
    fmt = _format_of(path)
    if not path.parent.exists():
        raise InvalidInput(f"{path.parent}: output folder does not exist")
    reuse = keep_source and mesh.source is not None and len(mesh.source.vertices) == mesh.n_vertices
    values = {k: np.asarray(v, dtype=np.float32) for k, v in mesh.vertex_values.items()}
    # other shapes of values are left to trimesh, which writes (n, k) as lists and drops the rest
    plain = fmt == "ply" and not reuse and all(v.shape == (mesh.n_vertices,) for v in values.values())
    data = None if plain else _export_with_trimesh(mesh, fmt, reuse, values)
    tmp = path.with_name(f".{path.name}.partial")
    try:
        with open(tmp, "wb") as fh:
            if data is None:
                _write_binary_triangles(fh, mesh.vertices, mesh.faces, values)
            else:
                fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def read_vertex_values(path: str | os.PathLike) -> dict[str, np.ndarray]:
    """Extra per-vertex float properties of a PLY file (e.g. stretch, bend), by name: (n,) each."""
    plain = _read_binary_triangles(Path(path), extra_floats=True)
    if plain is not None:
        records = plain[0]
        return {k: records[k].astype(records.dtype[k].newbyteorder("=")) for k in records.dtype.names
                if k not in _NOT_VERTEX_VALUES}

    import trimesh

    loaded = trimesh.load(str(path), file_type="ply", process=False)
    raw = loaded.metadata.get("_ply_raw", {}).get("vertex", {}).get("data")
    if raw is None or raw.dtype.names is None:
        return {}
    return {k: np.asarray(raw[k]).ravel() for k in raw.dtype.names if k not in _NOT_VERTEX_VALUES}


def _export_with_trimesh(mesh: TriangleMesh, fmt: str, reuse: bool, values: dict[str, np.ndarray]) -> bytes:
    import trimesh

    if reuse:
        out = mesh.source.copy()
        out.vertices = mesh.vertices
    else:
        out = trimesh.Trimesh(vertices=mesh.vertices, faces=mesh.faces, process=False)
    if fmt == "ply":
        out.vertex_attributes = values
    data = out.export(file_type=fmt)
    return data if isinstance(data, bytes) else data.encode()


@dataclass(frozen=True)
class _PlyTriangles:
    """Layout of a binary PLY holding vertices of float properties (x, y, z first) and triangles.

    vertex : one vertex record; face : one face record, fields count and index (3,).
    """

    vertex: np.dtype
    face: np.dtype
    n_vertices: int
    n_faces: int


def _read_binary_triangles(path: Path, extra_floats: bool) -> tuple[np.ndarray, np.ndarray] | None:
    """Vertex records (n,) and faces (m, 3) int64 of a binary PLY of positions and triangles.

    extra_floats : accept float vertex properties after x, y, z (else exactly x, y, z).
    None for any other file (ascii, colours, normals, UVs, polygons, other elements, a size
    that does not match the header): the caller hands it to trimesh, whose messages and quad
    triangulation then apply unchanged.
    """
    try:
        with open(path, "rb") as fh:
            layout = _binary_triangle_layout(fh, os.fstat(fh.fileno()).st_size)
            if layout is None or (not extra_floats and len(layout.vertex.names) != 3):
                return None
            vertices = np.fromfile(fh, dtype=layout.vertex, count=layout.n_vertices)
            faces = np.fromfile(fh, dtype=layout.face, count=layout.n_faces)
    except OSError:  # unreadable: trimesh reports it in the usual words
        return None
    # fixed-size records hold only if every face is a triangle; the size check can miss a
    # quad that a shorter polygon pays for
    if len(vertices) != layout.n_vertices or len(faces) != layout.n_faces or not (faces["count"] == 3).all():
        return None
    return vertices, faces["index"].astype(np.int64)


def _binary_triangle_layout(fh: BinaryIO, file_size: int) -> _PlyTriangles | None:
    """Parse a PLY header (Turk 1994) from fh's start, leaving fh at the data; None unless binary
    with exactly `element vertex` (float properties, x y z first) then `element face` (one list
    of triangle indices) and a file size that matches."""
    if fh.readline(8).rstrip(b"\r\n") != b"ply":
        return None
    lines = []
    while True:
        raw = fh.readline(_PLY_MAX_HEADER)
        if not raw.endswith(b"\n") or fh.tell() > _PLY_MAX_HEADER:
            return None
        words = raw.split()
        if not words:  # trimesh fails on a blank header line; let it say so
            return None
        if words[:1] in ([b"comment"], [b"obj_info"]):
            continue
        try:
            words = [w.decode("ascii") for w in words]
        except UnicodeDecodeError:
            return None
        if words == ["end_header"]:
            break
        lines.append(words)
    if not lines or len(lines[0]) != 3 or lines[0][0] != "format" or lines[0][2] != "1.0":
        return None
    order = _PLY_BYTE_ORDER.get(lines[0][1])
    if order is None:
        return None
    elements: list[tuple[str, int, list[list[str]]]] = []
    for words in lines[1:]:
        if words[0] == "element" and len(words) == 3 and words[2].isdigit():
            elements.append((words[1], int(words[2]), []))
        elif words[0] == "property" and elements:
            elements[-1][2].append(words[1:])
        else:
            return None
    if [e[0] for e in elements] != ["vertex", "face"]:
        return None
    (_, n_vertices, vertex_props), (_, n_faces, face_props) = elements
    if n_vertices == 0 or n_faces == 0:
        return None
    if any(len(p) != 2 or p[0] not in _PLY_FLOATS for p in vertex_props):
        return None
    names = [p[1] for p in vertex_props]
    if names[:3] != ["x", "y", "z"] or len(set(names)) != len(names):
        return None
    if len(face_props) != 1 or len(face_props[0]) != 4:
        return None
    kind, count_type, index_type, list_name = face_props[0]
    if kind != "list" or count_type not in _PLY_COUNTS or index_type not in _PLY_INDICES or list_name not in _PLY_FACE_LISTS:
        return None
    vertex = np.dtype([(name, order + _PLY_FLOATS[t]) for t, name in vertex_props])
    face = np.dtype([("count", order + _PLY_COUNTS[count_type]), ("index", order + _PLY_INDICES[index_type], (3,))])
    if fh.tell() + n_vertices * vertex.itemsize + n_faces * face.itemsize != file_size:
        return None
    return _PlyTriangles(vertex, face, n_vertices, n_faces)


def _write_binary_triangles(fh: BinaryIO, vertices: np.ndarray, faces: np.ndarray, values: dict[str, np.ndarray]) -> None:
    """Write binary little-endian PLY: float32 x y z, then each value as a float32 property, then
    triangles as uchar 3 + int32 indices (the record layout of trimesh's export_ply).

    vertices : (n, 3); faces : (m, 3); values : name -> (n,) float32, in file order.
    """
    header = ["ply", "format binary_little_endian 1.0", "comment written by isoclay",
              f"element vertex {len(vertices)}", "property float x", "property float y", "property float z"]
    header += [f"property float {name}" for name in values]
    header += [f"element face {len(faces)}", "property list uchar int vertex_indices", "end_header", ""]
    vertex_records = np.empty(len(vertices), dtype=[("vertex", "<f4", (3,))] + [(name, "<f4") for name in values])
    vertex_records["vertex"] = vertices
    for name, v in values.items():
        vertex_records[name] = v
    face_records = np.empty(len(faces), dtype=[("count", "u1"), ("index", "<i4", (3,))])
    face_records["count"] = 3
    face_records["index"] = faces
    fh.write("\n".join(header).encode("utf-8"))
    vertex_records.tofile(fh)
    face_records.tofile(fh)
