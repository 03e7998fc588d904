"""Read and write PLY, OBJ, STL and glTF meshes through trimesh."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from ..errors import InvalidInput, InvalidMesh
from .types import TriangleMesh

#: File extensions isoclay reads and writes, and trimesh's name for each.
FORMATS = {".ply": "ply", ".obj": "obj", ".stl": "stl", ".glb": "glb", ".gltf": "gltf"}


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
    original topology lines up with the input vertex for vertex.
    """
    import trimesh

    path = Path(path)
    fmt = _format_of(path)
    if not path.is_file():
        raise InvalidInput(f"{path}: no such file")
    if path.stat().st_size == 0:
        raise InvalidMesh(f"{path.name} is an empty file: export the mesh again")
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
    """
    import trimesh

    path = Path(path)
    fmt = _format_of(path)
    if not path.parent.exists():
        raise InvalidInput(f"{path.parent}: output folder does not exist")
    if keep_source and mesh.source is not None and len(mesh.source.vertices) == mesh.n_vertices:
        out = mesh.source.copy()
        out.vertices = mesh.vertices
    else:
        out = trimesh.Trimesh(vertices=mesh.vertices, faces=mesh.faces, process=False)
    if fmt == "ply":
        out.vertex_attributes = {k: np.asarray(v, dtype=np.float32) for k, v in mesh.vertex_values.items()}
    tmp = path.with_name(f".{path.name}.partial")
    try:
        data = out.export(file_type=fmt)
        with open(tmp, "wb") as fh:
            fh.write(data if isinstance(data, bytes) else data.encode())
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def read_vertex_values(path: str | os.PathLike) -> dict[str, np.ndarray]:
    """Extra per-vertex float properties of a PLY file (e.g. stretch, bend), by name."""
    import trimesh

    loaded = trimesh.load(str(path), file_type="ply", process=False)
    raw = loaded.metadata.get("_ply_raw", {}).get("vertex", {}).get("data")
    if raw is None or raw.dtype.names is None:
        return {}
    skip = {"x", "y", "z", "red", "green", "blue", "alpha", "nx", "ny", "nz"}
    return {k: np.asarray(raw[k]).ravel() for k in raw.dtype.names if k not in skip}
