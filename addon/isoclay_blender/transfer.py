"""Carrying the source's surface data onto a rebuilt result through the edit's own correspondence.

For each result vertex the solver names a source triangle (of the triangles the add-on sent) and
barycentric weights there (solver: pipeline.source_correspondence). From that:

- UV maps, per face corner, without smearing across seams: each result face takes one UV island,
  the island of the source face its corners map to; a face whose corners land in different
  islands is resolved to the island of the source face nearest its centre, and its other corners
  are re-projected onto that island (their UVs continue the island across the seam rather than
  averaging two places of the texture).
- Material index per face: the corners' source face when they agree, else the nearest one.
- Colour attributes (point or corner domain) and vertex-group weights per vertex, interpolated.
- Seams: marked where neighbouring result faces took different islands of the active UV map.

This is what Blender's Data Transfer modifier does from the nearest point, done from the edit's
correspondence instead (for a deform, the point the material came from, not the old position).
"""

from __future__ import annotations

from dataclasses import dataclass

import bpy
import numpy as np

from . import mesh_io

#: UVs of two corners of one edge closer than this are continuous (same island); UV units.
UV_TOLERANCE = 1e-5


@dataclass(frozen=True)
class Carried:
    """What carry_surface_data found: notes for the artist and vertex-group weights to write on the object
    (groups live on objects, the rest was written on the mesh). group_weights : (n, len(group_names))."""

    notes: tuple
    group_names: tuple = ()
    group_weights: np.ndarray | None = None


@dataclass(frozen=True)
class SourceSurface:
    """The source as sent: local positions (n, 3), triangles (m, 3) with their corners (loops) and faces."""

    positions: np.ndarray
    tri_verts: np.ndarray
    tri_loops: np.ndarray
    tri_poly: np.ndarray


# ------------------------------------------------------------------------------ numpy only

def uv_islands(uv: np.ndarray, corner_vert: np.ndarray, corner_edge: np.ndarray, loop_start: np.ndarray,
               loop_total: np.ndarray) -> np.ndarray:
    """(P,) island label per polygon: polygons sharing an edge whose UVs agree at both ends are one island."""
    n_poly, n_loop = len(loop_start), len(corner_vert)
    if n_poly == 0:
        return np.zeros(0, dtype=np.int64)
    poly = np.repeat(np.arange(n_poly), loop_total)
    nxt = np.arange(1, n_loop + 1)
    nxt[loop_start + loop_total - 1] = loop_start
    v0, v1 = corner_vert, corner_vert[nxt]
    uv0, uv1 = uv, uv[nxt]
    swap = v0 > v1  # express every corner's edge UVs from its lower vertex to its higher one
    lo = np.where(swap[:, None], uv1, uv0)
    hi = np.where(swap[:, None], uv0, uv1)
    order = np.argsort(corner_edge, kind="stable")
    e = corner_edge[order]
    same_edge = e[1:] == e[:-1]
    a, b = order[:-1][same_edge], order[1:][same_edge]
    agree = (np.abs(lo[a] - lo[b]).max(axis=1) <= UV_TOLERANCE) & (np.abs(hi[a] - hi[b]).max(axis=1) <= UV_TOLERANCE)
    return connected_labels(n_poly, poly[a[agree]], poly[b[agree]])


def connected_labels(n: int, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(n,) label per node of the graph with edges (a, b): the smallest node index of its component."""
    labels = np.arange(n)
    if len(a) == 0:
        return labels
    while True:
        low = np.minimum(labels[a], labels[b])
        before = labels.copy()
        np.minimum.at(labels, a, low)
        np.minimum.at(labels, b, low)
        while True:  # pointer jumping
            jumped = labels[labels]
            if np.array_equal(jumped, labels):
                break
            labels = jumped
        if np.array_equal(labels, before):
            return labels


def interpolate(values: np.ndarray, corners: np.ndarray, face: np.ndarray, bary: np.ndarray) -> np.ndarray:
    """(n, c) values at result vertices: bary-weighted values[corners[face]] (zeros where face is -1).

    values : (N, c) per source vertex or corner; corners : (m, 3) indices into values per triangle.
    """
    out = np.zeros((len(face), values.shape[1]), dtype=np.float64)
    ok = face >= 0
    idx = corners[face[ok]]
    out[ok] = np.einsum("ij,ijk->ik", bary[ok].astype(np.float64), values[idx].astype(np.float64))
    return out


# ------------------------------------------------------------------------------ Blender side

def source_surface(mesh: bpy.types.Mesh, positions: np.ndarray | None = None) -> SourceSurface:
    """The triangles of `mesh` exactly as mesh_io.read_triangles sends them, with corners and faces."""
    loops, poly = mesh_io.read_corner_triangles(mesh)
    corner_vert = mesh_io.read_corner_verts(mesh)
    pos = mesh_io.read_positions(mesh) if positions is None else positions
    return SourceSurface(np.asarray(pos, dtype=np.float64), corner_vert[loops].astype(np.int64), loops, poly)


class _Nearest:
    """Closest-triangle queries on (a subset of) the source, built on first use (mathutils BVHTree)."""

    def __init__(self, surface: SourceSurface, triangles: np.ndarray):
        from mathutils.bvhtree import BVHTree

        self.triangles = triangles
        self.surface = surface
        self.tree = BVHTree.FromPolygons(surface.positions.tolist(), surface.tri_verts[triangles].tolist())

    def query(self, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(k,) source triangle indices and (k, 3) barycentric weights of the nearest points."""
        tri = np.zeros(len(points), dtype=np.int64)
        loc = np.zeros((len(points), 3))
        for i, p in enumerate(points.tolist()):
            hit = self.tree.find_nearest(p)
            if hit[2] is not None:
                tri[i] = self.triangles[hit[2]]
                loc[i] = hit[0]
        v = self.surface.positions[self.surface.tri_verts[tri]]
        return tri, _barycentric(loc, v[:, 0], v[:, 1], v[:, 2])


def _barycentric(p, a, b, c) -> np.ndarray:
    v0, v1, v2 = b - a, c - a, p - a
    d00, d01, d11 = (v0 * v0).sum(1), (v0 * v1).sum(1), (v1 * v1).sum(1)
    d20, d21 = (v2 * v0).sum(1), (v2 * v1).sum(1)
    den = d00 * d11 - d01 * d01
    den = np.where(np.abs(den) > 0, den, 1.0)
    v = (d11 * d20 - d01 * d21) / den
    w = (d00 * d21 - d01 * d20) / den
    out = np.clip(np.stack([1 - v - w, v, w], 1), 0.0, 1.0)
    return out / np.maximum(out.sum(1, keepdims=True), 1e-30)


def carry_surface_data(source_obj: bpy.types.Object, source_mesh: bpy.types.Mesh, surface: SourceSurface,
                       result: bpy.types.Mesh, result_faces: np.ndarray, face: np.ndarray, bary: np.ndarray,
                       skip_names: set) -> Carried:
    """Write UVs, material indices, colours and seams onto `result`; vertex-group weights come back in Carried.

    source_mesh : the source's evaluated mesh the triangles came from (UVs, materials, colours,
        weights are read from it); result_faces : (r, 3) triangles of `result` (its corner order);
    face, bary : the solver's correspondence, per result vertex.
    """
    face = np.asarray(face, dtype=np.int64)
    bary = np.asarray(bary, dtype=np.float64)
    if face.max(initial=-1) >= len(surface.tri_verts):
        return Carried(("the source changed since the edit: its UVs, materials and colours were not carried over",))
    n_poly = len(source_mesh.polygons)
    vert_poly = np.where(face >= 0, surface.tri_poly[np.maximum(face, 0)], -1)
    corner_poly = vert_poly[result_faces]  # (r, 3)
    points = interpolate(surface.positions, surface.tri_verts, face, bary)  # source points per result vertex
    centres = points[result_faces].mean(axis=1)

    materials = np.zeros(n_poly, dtype=np.int32)
    if n_poly:
        source_mesh.polygons.foreach_get("material_index", materials)
    islands = {}
    loop_start = np.empty(n_poly, dtype=np.int32)
    loop_total = np.empty(n_poly, dtype=np.int32)
    source_mesh.polygons.foreach_get("loop_start", loop_start)
    source_mesh.polygons.foreach_get("loop_total", loop_total)
    corner_vert = mesh_io.read_corner_verts(source_mesh)
    corner_edge = mesh_io.read_corner_edges(source_mesh)
    uvs = {}
    for layer in source_mesh.uv_layers:
        uv = np.empty(len(source_mesh.loops) * 2, dtype=np.float32)
        layer.uv.foreach_get("vector", uv)
        uvs[layer.name] = uv.reshape(-1, 2)
        islands[layer.name] = uv_islands(uvs[layer.name], corner_vert, corner_edge, loop_start, loop_total)

    # faces whose corners disagree about the material take the material of the source face nearest their centre
    safe = np.maximum(corner_poly, 0)
    disagree = (materials[safe].min(1) != materials[safe].max(1)) | (corner_poly.min(1) < 0)
    face_poly = corner_poly[:, 0].copy()
    if disagree.any() and len(surface.tri_verts):
        nearest = _Nearest(surface, np.arange(len(surface.tri_verts)))
        tri, _ = nearest.query(centres[disagree])
        face_poly[disagree] = surface.tri_poly[tri]
    face_poly = np.maximum(face_poly, 0)

    if n_poly:
        result.polygons.foreach_set("material_index", materials[face_poly].astype(np.int32))

    active_uv = source_mesh.uv_layers.active.name if source_mesh.uv_layers.active else None
    homes = {}  # result face -> nearest source triangle to its centre, shared by every UV map
    for name, uv in uvs.items():
        corner_uv = _corner_uvs(surface, uv, islands[name][surface.tri_poly], result_faces, face, bary, points,
                                centres, homes)
        layer = result.uv_layers.new(name=name)
        layer.uv.foreach_set("vector", corner_uv.astype(np.float32).ravel())
        if name == active_uv:
            result.uv_layers.active = layer
            _mark_seams(result, corner_uv.reshape(-1, 2))

    for attr in source_mesh.color_attributes:
        if attr.name in skip_names or attr.domain not in ('POINT', 'CORNER'):
            continue
        count = len(source_mesh.vertices) if attr.domain == 'POINT' else len(source_mesh.loops)
        raw = np.empty(count * 4, dtype=np.float32)
        attr.data.foreach_get("color", raw)
        corners = surface.tri_verts if attr.domain == 'POINT' else surface.tri_loops
        per_vertex = interpolate(raw.reshape(-1, 4), corners, face, bary).astype(np.float32)
        out = result.color_attributes.new(attr.name, attr.data_type, attr.domain)
        out.data.foreach_set("color", (per_vertex if attr.domain == 'POINT' else per_vertex[result_faces.ravel()]).ravel())
    if source_mesh.color_attributes.active_color_name in result.color_attributes:
        result.color_attributes.active_color_name = source_mesh.color_attributes.active_color_name

    groups = list(source_obj.vertex_groups)
    if groups:
        weights = np.zeros((len(source_mesh.vertices), len(groups)), dtype=np.float32)
        for v in source_mesh.vertices:
            for g in v.groups:
                if g.group < len(groups):
                    weights[v.index, g.group] = g.weight
        carried = interpolate(weights, surface.tri_verts, face, bary).astype(np.float32)
        return Carried((), tuple(g.name for g in groups), carried)
    return Carried(())


def uv_adjacency(surface: SourceSurface, uv: np.ndarray) -> np.ndarray:
    """(m, 3) source triangles sharing each triangle's edges with continuous UVs at both ends (-1: none).

    A triangle has three edges, so at most three such neighbours on a manifold surface (a non-manifold
    edge keeps one of its partners).
    """
    m = len(surface.tri_verts)
    tri = np.repeat(np.arange(m), 3)
    slot = np.tile(np.arange(3), m)
    la, lb = surface.tri_loops.ravel(), surface.tri_loops[:, [1, 2, 0]].ravel()
    va, vb = surface.tri_verts.ravel(), surface.tri_verts[:, [1, 2, 0]].ravel()
    swap = va > vb
    lo_v, hi_v = np.where(swap, vb, va), np.where(swap, va, vb)
    lo_uv, hi_uv = np.where(swap[:, None], uv[lb], uv[la]), np.where(swap[:, None], uv[la], uv[lb])
    order = np.lexsort((hi_v, lo_v))
    same = (lo_v[order][1:] == lo_v[order][:-1]) & (hi_v[order][1:] == hi_v[order][:-1])
    a, b = order[:-1][same], order[1:][same]
    agree = (np.abs(lo_uv[a] - lo_uv[b]).max(1) <= UV_TOLERANCE) & (np.abs(hi_uv[a] - hi_uv[b]).max(1) <= UV_TOLERANCE)
    a, b = a[agree], b[agree]
    adj = np.full((m, 3), -1, dtype=np.int64)
    adj[tri[a], slot[a]] = tri[b]
    adj[tri[b], slot[b]] = tri[a]
    return adj


def closest_on_triangles(p: np.ndarray, a: np.ndarray, b: np.ndarray, c: np.ndarray) -> np.ndarray:
    """(..., 3) closest points of triangles (a, b, c) to points p (all (..., 3)): Ericson (2005),
    Real-Time Collision Detection, 5.1.5, by Voronoi regions, vectorised."""
    ab, ac, ap = b - a, c - a, p - a
    d1, d2 = (ab * ap).sum(-1), (ac * ap).sum(-1)
    bp, cp = p - b, p - c
    d3, d4 = (ab * bp).sum(-1), (ac * bp).sum(-1)
    d5, d6 = (ab * cp).sum(-1), (ac * cp).sum(-1)
    va, vb, vc = d3 * d6 - d5 * d4, d5 * d2 - d1 * d6, d1 * d4 - d3 * d2
    denom = va + vb + vc
    safe = np.where(np.abs(denom) > 1e-300, denom, 1.0)
    v, w = vb / safe, vc / safe
    out = a + ab * v[..., None] + ac * w[..., None]  # inside the face
    def put(mask, value):
        np.copyto(out, value, where=mask[..., None])
    t = d4 - d3 + (d5 - d6)
    put((va <= 0) & (d4 - d3 >= 0) & (d5 - d6 >= 0), b + (c - b) * (np.clip((d4 - d3) / np.where(t != 0, t, 1), 0, 1))[..., None])
    put((vb <= 0) & (d2 >= 0) & (d6 <= 0), a + ac * np.clip(d2 / np.where(d2 - d6 != 0, d2 - d6, 1), 0, 1)[..., None])
    put((vc <= 0) & (d1 >= 0) & (d3 <= 0), a + ab * np.clip(d1 / np.where(d1 - d3 != 0, d1 - d3, 1), 0, 1)[..., None])
    put((d6 >= 0) & (d5 <= d6), c)
    put((d3 >= 0) & (d4 <= d3), b)
    put((d1 <= 0) & (d2 <= 0), a)
    return out


def uv_scale(surface: SourceSurface, uv: np.ndarray) -> np.ndarray:
    """(m,) largest UV length per unit of surface length in each source triangle (0 for degenerate UVs)."""
    p = surface.positions[surface.tri_verts]
    q = uv[surface.tri_loops].astype(np.float64)
    e1, e2 = p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]
    n1 = np.linalg.norm(e1, axis=1)
    x = e1 / np.maximum(n1, 1e-30)[:, None]
    y = e2 - (e2 * x).sum(1)[:, None] * x
    ny = np.linalg.norm(y, axis=1)
    # 2x2 map from the triangle's own plane coordinates to UV; its largest singular value
    a = np.stack([n1, (e2 * x).sum(1)], 1), np.stack([np.zeros_like(n1), ny], 1)
    du1, du2 = q[:, 1] - q[:, 0], q[:, 2] - q[:, 0]
    det = n1 * ny
    ok = det > 1e-30
    inv = np.where(ok, 1.0 / np.where(ok, det, 1.0), 0.0)
    # J = [du1 du2] @ inverse([[n1, e2.x], [0, ny]])
    j11 = du1[:, 0] * ny * inv
    j12 = (du2[:, 0] * n1 - du1[:, 0] * a[0][:, 1]) * inv
    j21 = du1[:, 1] * ny * inv
    j22 = (du2[:, 1] * n1 - du1[:, 1] * a[0][:, 1]) * inv
    j = np.stack([np.stack([j11, j12], 1), np.stack([j21, j22], 1)], 1)
    return np.where(ok, np.linalg.norm(j, ord=2, axis=(1, 2)), 0.0)


#: A result face whose UVs stretch more than this many times the source's own scale there straddles a
#: cut of the UV map (a seam inside one island, like a cylinder's) and is resolved, not interpolated.
STRAY_STRETCH = 3.0


#: Rings of UV-continuous source triangles around a straddling face's home triangle searched for its
#: stray corners (3 + 9 + 27 + 81 candidates): enough while result faces are no larger than a few
#: source triangles (the usual case: a rebuilt surface is finer than or as fine as its source).
PATCH_RINGS = 4
#: Of those, the ones whose bounding spheres come nearest get an exact closest-point query.
EXACT_CANDIDATES = 8


def _tri_centres(surface: SourceSurface) -> tuple[np.ndarray, np.ndarray]:
    """(m, 3) centroids and (m,) bounding radii of the source triangles."""
    tv = surface.positions[surface.tri_verts]
    mid = tv.mean(axis=1)
    return mid, np.linalg.norm(tv - mid[:, None], axis=2).max(axis=1)


def _corner_uvs(surface, uv, tri_island, result_faces, face, bary, points, centres, homes) -> np.ndarray:
    """(r, 3, 2) UVs of the result's corners for one UV map (see the module docstring)."""
    per_vertex = interpolate(uv, surface.tri_loops, face, bary)
    corner_uv = per_vertex[result_faces]  # (r, 3, 2)
    corner_tri = np.where(face >= 0, face, 0)[result_faces]
    isl = tri_island[corner_tri]
    stray_face = isl.min(1) != isl.max(1)
    scale = uv_scale(surface, uv)
    p = points[result_faces]
    edge_3d = np.linalg.norm(p - p[:, [1, 2, 0]], axis=2)
    edge_uv = np.linalg.norm(corner_uv - corner_uv[:, [1, 2, 0]], axis=2)
    allowed = STRAY_STRETCH * scale[corner_tri].max(1)[:, None] * edge_3d + 10 * UV_TOLERANCE
    stray_face |= (edge_uv > allowed).any(axis=1)
    todo = np.flatnonzero(stray_face)
    if len(todo) == 0:
        return corner_uv
    missing = [r for r in todo.tolist() if r not in homes]
    if missing:
        tri, _ = _Nearest(surface, np.arange(len(surface.tri_verts))).query(centres[missing])
        homes.update(zip(missing, tri.tolist()))
    home = np.array([homes[r] for r in todo.tolist()], dtype=np.int64)
    # the home triangle's UV chart nearby: rings of UV-continuous neighbours, padded with the home itself
    adj = uv_adjacency(surface, uv)
    rings, front = [home[:, None]], home[:, None]
    for _ in range(PATCH_RINGS):
        front = adj[front].reshape(len(home), -1)
        front = np.where(front >= 0, front, home[:, None])
        rings.append(front)
    patch = np.concatenate(rings, axis=1)  # (s, K)
    own = corner_tri[todo]  # (s, 3)
    stray = ~(patch[:, :, None] == own[:, None, :]).any(axis=1)  # corners whose triangle is off the chart
    rows, cols = np.nonzero(stray)
    if len(rows) == 0:
        return corner_uv
    cand = patch[rows]  # (q, K)
    pos = surface.positions
    target = p[todo[rows], cols][:, None, :]
    # exact distances only for the few candidates whose bounding spheres come nearest (a lower bound)
    mid, reach = _tri_centres(surface)
    bound = np.linalg.norm(mid[cand] - target, axis=2) - reach[cand]
    keep = min(EXACT_CANDIDATES, cand.shape[1])
    cand = np.take_along_axis(cand, np.argpartition(bound, keep - 1, axis=1)[:, :keep], axis=1)
    tv = pos[surface.tri_verts[cand]]  # (q, keep, 3, 3)
    hit = closest_on_triangles(np.broadcast_to(target, tv[:, :, 0].shape), tv[:, :, 0], tv[:, :, 1], tv[:, :, 2])
    best = np.argmin(((hit - target) ** 2).sum(-1), axis=1)
    pick = np.arange(len(rows))
    tri = cand[pick, best]
    tri_v = tv[pick, best]
    weights = _barycentric(hit[pick, best], tri_v[:, 0], tri_v[:, 1], tri_v[:, 2])
    corner_uv[todo[rows], cols] = np.einsum("ij,ijk->ik", weights, uv[surface.tri_loops[tri]].astype(np.float64))
    return corner_uv


def _mark_seams(mesh: bpy.types.Mesh, corner_uv: np.ndarray) -> None:
    """Seams on the result's edges where the two faces' UVs at the shared corners differ (its UV cuts)."""
    edges = mesh_io.read_corner_edges(mesh)
    verts = mesh_io.read_corner_verts(mesh)
    n = len(edges)
    nxt = np.arange(n).reshape(-1, 3)[:, [1, 2, 0]].ravel()  # triangles: corners 3r..3r+2
    va, vb = verts, verts[nxt]
    swap = va > vb
    lo = np.where(swap[:, None], corner_uv[nxt], corner_uv)
    hi = np.where(swap[:, None], corner_uv, corner_uv[nxt])
    order = np.argsort(edges, kind="stable")
    same = edges[order][1:] == edges[order][:-1]
    a, b = order[:-1][same], order[1:][same]
    cut = (np.abs(lo[a] - lo[b]).max(1) > 1e-4) | (np.abs(hi[a] - hi[b]).max(1) > 1e-4)
    seam = np.zeros(len(mesh.edges), dtype=bool)
    seam[edges[a[cut]]] = True
    mesh.edges.foreach_set("use_seam", seam)


def write_vertex_groups(obj: bpy.types.Object, names: list[str], weights: np.ndarray) -> None:
    """Vertex groups `names` on `obj` with (n, len(names)) weights (zeros left out)."""
    for k, name in enumerate(names):
        group = obj.vertex_groups.new(name=name)
        column = weights[:, k]
        for i in np.flatnonzero(column > 0).tolist():
            group.add((i,), float(column[i]), 'REPLACE')
