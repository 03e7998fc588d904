"""Build the workshop demo scene: five props, handles and targets for the edits, set dressing, PLY copies.

Run with Blender as a Python module (no torch here):

    .venv-blender/bin/python demo_blends/make_workshop.py --out demo_blends

Writes into OUT:
    workshop.blend        the scene (compressed): props on a workbench, light, camera,
                          handle attribute and target empties for the two deform edits
    jug.ply lantern.ply hook.ply stone.ply anvil.ply
                          each prop alone, triangles, world units (metres)
    hook_handles.json lantern_handles.json
                          {"handles": [[x,y,z], ...], "targets": [[x,y,z], ...]} in the PLY's units
    demo_edits.json       the four demo edits the `isoclay demo` command runs

Everything is built from numpy and Blender's own mesh operators with fixed seeds: two runs give the
same PLY and JSON files byte for byte (the .blend differs only in Blender's file bookkeeping). Convention for handles in the .blend: the mesh carries an INT point attribute
"isoclay_handle" (1 = handle); the collection "<object> targets" holds one empty per handle,
"<object>.target.000", ... in ascending order of the handle vertex indices, each with a custom
property "isoclay_vertex" naming its vertex. A moved empty is a moved target; an empty left on its
vertex holds that vertex still.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

import numpy as np

try:
    import bpy  # first: bmesh and mathutils come with it
    import bmesh
    from mathutils import Vector
except ImportError:  # pragma: no cover - only reached outside the Blender environment
    sys.stderr.write("error: make_workshop.py needs Blender's Python module: run it with .venv-blender/bin/python\n")
    sys.exit(2)

#: Seed for every random choice in the scene (the stone's noise).
SEED = 20261201
#: Name of the point attribute marking handle vertices (INT, 1 = handle).
HANDLE_ATTRIBUTE = "isoclay_handle"
#: Height of the workbench top, metres.
BENCH_TOP = 0.75
#: Where each prop stands on the bench (x, y), metres.
PLACES = {"jug": (-0.62, 0.02), "lantern": (-0.28, 0.06), "hook": (0.02, 0.0), "stone": (0.28, -0.06), "anvil": (0.6, 0.04)}


# --------------------------------------------------------------------------- numpy builders


def catmull_rom(points: np.ndarray, samples_per_span: int) -> np.ndarray:
    """(k, d) control points -> smooth curve through them, (samples_per_span * (k - 1) + 1, d)."""
    p = np.vstack([2 * points[0] - points[1], points, 2 * points[-1] - points[-2]])
    out = []
    t = np.linspace(0.0, 1.0, samples_per_span, endpoint=False)[:, None]
    for i in range(1, len(p) - 2):
        p0, p1, p2, p3 = p[i - 1], p[i], p[i + 1], p[i + 2]
        out.append(
            0.5
            * (
                2 * p1
                + (-p0 + p2) * t
                + (2 * p0 - 5 * p1 + 4 * p2 - p3) * t**2
                + (-p0 + 3 * p1 - 3 * p2 + p3) * t**3
            )
        )
    out.append(points[-1][None])
    return np.vstack(out)


def revolve(profile: np.ndarray, segments: int) -> tuple[np.ndarray, np.ndarray]:
    """Surface of revolution about z.

    profile : (k, 2) (radius, z) running from the axis (radius 0) around the solid's outline back
        to the axis, so that the outside lies to the right when walking along it in the (r, z) plane
        (bottom centre -> outer wall -> top). Points on the axis become single pole vertices.
    Returns vertices (n, 3) and outward triangles (m, 3).
    """
    verts, rings = [], []
    angles = np.linspace(0.0, 2 * np.pi, segments, endpoint=False)
    for r, z in profile:
        start = sum(len(x) for x in verts)
        if r <= 1e-12:
            verts.append(np.array([[0.0, 0.0, z]]))
            rings.append(np.full(segments, start))
        else:
            verts.append(np.column_stack([r * np.cos(angles), r * np.sin(angles), np.full(segments, z)]))
            rings.append(start + np.arange(segments))
    faces = []
    nxt = np.roll(np.arange(segments), -1)
    for a, b in zip(rings[:-1], rings[1:]):
        a0, a1, b0, b1 = a, a[nxt], b, b[nxt]
        # walking up the profile with the angle increasing counter-clockwise, (a0, a1, b1) faces outward
        tri1 = np.column_stack([a0, a1, b1])
        tri2 = np.column_stack([a0, b1, b0])
        for tri in (tri1, tri2):
            keep = (tri[:, 0] != tri[:, 1]) & (tri[:, 1] != tri[:, 2]) & (tri[:, 0] != tri[:, 2])
            faces.append(tri[keep])
    return np.vstack(verts), np.vstack(faces).astype(np.int64)


def sweep(path: np.ndarray, radii: np.ndarray, segments: int, closed: bool = False, squash: float = 1.0):
    """Tube of round (or elliptical) section along a path lying in the xz-plane.

    path : (k, 3) centre line with y = 0; radii : (k,) tube radius at each point;
    squash : section height along y relative to its width in the path's plane.
    Open paths get flat end caps (a centre vertex each) so the tube is watertight.
    """
    k = len(path)
    if closed:
        tangent = np.roll(path, -1, axis=0) - np.roll(path, 1, axis=0)
    else:
        tangent = np.gradient(path, axis=0)
    tangent /= np.linalg.norm(tangent, axis=1, keepdims=True)
    binormal = np.array([0.0, 1.0, 0.0])
    normal = np.cross(binormal, tangent)  # in the path's plane, perpendicular to the tangent
    ang = np.linspace(0.0, 2 * np.pi, segments, endpoint=False)
    c, s = np.cos(ang), np.sin(ang)
    ring = (
        path[:, None, :]
        + radii[:, None, None] * (c[None, :, None] * normal[:, None, :] + squash * s[None, :, None] * binormal)
    )
    verts = ring.reshape(-1, 3)
    idx = np.arange(k * segments).reshape(k, segments)
    nxt = np.roll(np.arange(segments), -1)
    spans = k if closed else k - 1
    faces = []
    for i in range(spans):
        a, b = idx[i], idx[(i + 1) % k]
        faces.append(np.column_stack([a, b[nxt], b]))
        faces.append(np.column_stack([a, a[nxt], b[nxt]]))
    faces = np.vstack(faces)
    if not closed:
        start, end = len(verts), len(verts) + 1
        verts = np.vstack([verts, path[0], path[-1]])
        faces = np.vstack(
            [
                faces,
                np.column_stack([np.full(segments, start), idx[0, nxt], idx[0]]),
                np.column_stack([np.full(segments, end), idx[-1], idx[-1, nxt]]),
            ]
        )
    return verts, _orient_outward(verts, faces.astype(np.int64))


def grid_box(lo, hi, divisions) -> tuple[np.ndarray, np.ndarray]:
    """Closed box from corner lo to corner hi, each face split into a grid (divisions per axis)."""
    lo, hi = np.asarray(lo, float), np.asarray(hi, float)
    n = np.asarray(divisions, int)
    verts, faces = [], []
    for axis in range(3):
        u, v = (axis + 1) % 3, (axis + 2) % 3
        gu = np.linspace(lo[u], hi[u], n[u] + 1)
        gv = np.linspace(lo[v], hi[v], n[v] + 1)
        uu, vv = np.meshgrid(gu, gv, indexing="ij")
        for side in (lo[axis], hi[axis]):
            p = np.zeros((uu.size, 3))
            p[:, axis], p[:, u], p[:, v] = side, uu.ravel(), vv.ravel()
            base = sum(len(x) for x in verts)
            ids = base + np.arange(uu.size).reshape(uu.shape)
            a, b, c, d = ids[:-1, :-1].ravel(), ids[1:, :-1].ravel(), ids[1:, 1:].ravel(), ids[:-1, 1:].ravel()
            verts.append(p)
            # (a, b, c) faces along +axis (u x v); the low side must face the other way
            tri = [np.column_stack([a, b, c]), np.column_stack([a, c, d])]
            faces.extend(tri if side == hi[axis] else [t[:, ::-1] for t in tri])
    v = np.vstack(verts)
    f = np.vstack(faces)
    # weld the shared edges of the six grids
    key = np.round(v / (1e-7 * max(1.0, np.abs(v).max())))
    _, first, inverse = np.unique(key, axis=0, return_index=True, return_inverse=True)
    order = np.argsort(first)
    remap = np.empty_like(order)
    remap[order] = np.arange(len(order))
    v = v[first[order]]
    f = remap[inverse.ravel()[f]]
    return v, _orient_outward(v, f.astype(np.int64))


def _orient_outward(v: np.ndarray, f: np.ndarray) -> np.ndarray:
    """Flip all faces of a closed part if its signed volume is negative."""
    a, b, c = v[f[:, 0]], v[f[:, 1]], v[f[:, 2]]
    vol = np.einsum("ij,ij->i", a, np.cross(b, c)).sum()
    return f[:, ::-1].copy() if vol < 0 else f


def merge_parts(parts) -> tuple[np.ndarray, np.ndarray]:
    """Concatenate loose parts [(v, f), ...] into one vertex and face list (no welding)."""
    verts, faces, offset = [], [], 0
    for v, f in parts:
        verts.append(v)
        faces.append(f + offset)
        offset += len(v)
    return np.vstack(verts), np.vstack(faces)


def fourier_noise(points: np.ndarray, rng: np.random.Generator, count: int, wavelength: float, rms: float):
    """Smooth random field: a sum of `count` plane waves of about `wavelength`, root-mean-square `rms`."""
    dirs = rng.normal(size=(count, 3))
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    k = 2 * np.pi / (wavelength * rng.uniform(0.75, 1.3, count))
    phase = rng.uniform(0.0, 2 * np.pi, count)
    return rms * np.sqrt(2.0 / count) * np.sin(points @ (dirs * k[:, None]).T + phase).sum(axis=1)


# --------------------------------------------------------------------------- props (local coordinates, z up, base at z = 0)


def jug_outline(z: np.ndarray) -> np.ndarray:
    """Outer radius of the jug body at height z (metres)."""
    ctrl = np.array([[0.052, 0.0], [0.066, 0.025], [0.082, 0.075], [0.078, 0.115], [0.056, 0.165], [0.041, 0.200], [0.044, 0.228], [0.052, 0.245]])
    curve = catmull_rom(ctrl, 24)
    return np.interp(z, curve[:, 1], curve[:, 0])


def build_jug():
    """Thrown clay jug: a thick-walled body of revolution and a pulled handle as a separate part."""
    wall, floor, top = 0.006, 0.008, 0.245
    z_out = np.linspace(0.004, top - wall / 2, 46)
    lip_angles = np.linspace(0.0, np.pi, 7)[1:-1]
    r_top = jug_outline(np.array([top - wall / 2]))[0]
    profile = [(0.0, 0.0), (0.036, 0.0), (0.049, 0.0012)]
    profile += [(r, z) for r, z in zip(jug_outline(z_out), z_out)]
    # rounded lip: half circle from the outer to the inner wall
    lip_c = r_top - wall / 2
    profile += [(lip_c + wall / 2 * math.cos(a), top - wall / 2 + wall / 2 * math.sin(a)) for a in lip_angles]
    z_in = np.linspace(top - wall / 2, floor + 0.004, 44)
    profile += [(r - wall, z) for r, z in zip(jug_outline(z_in), z_in)]
    profile += [(jug_outline(np.array([floor]))[0] - wall - 0.006, floor), (0.0, floor)]
    body = revolve(np.array(profile), 48)

    # handle: a cubic Bezier in the xz-plane on the -x side, both ends sunk 4 mm into the wall
    z0, z3 = 0.178, 0.07
    p0 = np.array([-(jug_outline(np.array([z0]))[0] - 0.004), 0.0, z0])
    p3 = np.array([-(jug_outline(np.array([z3]))[0] - 0.004), 0.0, z3])
    p1 = np.array([-0.145, 0.0, 0.205])
    p2 = np.array([-0.15, 0.0, 0.06])
    t = np.linspace(0.0, 1.0, 60)[:, None]
    path = (1 - t) ** 3 * p0 + 3 * (1 - t) ** 2 * t * p1 + 3 * (1 - t) * t**2 * p2 + t**3 * p3
    radii = 0.0085 - 0.0015 * np.sin(np.pi * t.ravel())  # thinner in the middle, where it is pulled
    handle = sweep(path, radii, 20, squash=0.7)
    return merge_parts([body, handle])


def build_lantern():
    """Wrought-iron lantern of loose touching parts: base, glass, four bars, cap with roof, hanging ring."""
    parts = []
    base_r, base_h = 0.078, 0.02
    parts.append(revolve(np.array([(0, 0), (base_r - 0.003, 0), (base_r, 0.003), (base_r, base_h - 0.003), (base_r - 0.003, base_h), (0, base_h)]), 48))
    glass_r, glass_top = 0.056, 0.2
    sink = 0.001  # parts overlap by 1 mm where they meet: touching, never sharing a vertex
    zs = np.linspace(base_h - sink, glass_top + sink, 24)
    parts.append(revolve(np.array([(0, zs[0])] + [(glass_r, z) for z in zs] + [(0, zs[-1])]), 40))
    bar = 0.010
    for k in range(4):
        a = np.pi / 4 + k * np.pi / 2
        cx, cy = (glass_r + bar / 2 - 0.001) * math.cos(a), (glass_r + bar / 2 - 0.001) * math.sin(a)
        parts.append(grid_box([cx - bar / 2, cy - bar / 2, base_h - sink], [cx + bar / 2, cy + bar / 2, glass_top + sink], [2, 2, 30]))
    cap_r, cap_h, roof_top = 0.072, 0.014, 0.275
    roof = [(0, glass_top), (cap_r, glass_top), (cap_r, glass_top + cap_h)]
    roof += [(cap_r + (0.014 - cap_r) * s, glass_top + cap_h + (roof_top - glass_top - cap_h) * s) for s in np.linspace(0.1, 1.0, 12)]
    roof += [(0, roof_top)]
    parts.append(revolve(np.array(roof), 48))
    # hanging ring standing in the xz-plane, sunk 2 mm into the roof's tip
    ring_R, ring_r = 0.024, 0.0045
    ang = np.linspace(0.0, 2 * np.pi, 48, endpoint=False)
    centre_z = roof_top - 0.002 + ring_R + ring_r
    path = np.column_stack([ring_R * np.sin(ang), np.zeros_like(ang), centre_z + ring_R * np.cos(ang)])
    parts.append(sweep(path, np.full(len(ang), ring_r), 16, closed=True))
    return merge_parts(parts)


#: Hook centre line: shank top, where the shank meets the bend, bend centre and radius, bend end angle.
HOOK_TOP, HOOK_SHANK_END, HOOK_BEND_R, HOOK_END_DEG = 0.23, 0.1, 0.036, 400.0
#: The demo edits: how far the hook's tip turns about the bend, how far the lantern's top tilts.
HOOK_TIP_DEG, LANTERN_TILT_DEG = 35.0, 14.0


def hook_path() -> np.ndarray:
    """Centre line of the forged hook in the xz-plane: straight shank, a bend, a short tip."""
    step = 0.0018
    shank = np.linspace(HOOK_TOP, HOOK_SHANK_END, int((HOOK_TOP - HOOK_SHANK_END) / step), endpoint=False)
    pts = [np.column_stack([np.zeros_like(shank), np.zeros_like(shank), shank])]
    centre = np.array([HOOK_BEND_R, 0.0, HOOK_SHANK_END])
    span = math.radians(HOOK_END_DEG - 180.0)
    a = math.radians(180.0) + np.linspace(0.0, span, int(span * HOOK_BEND_R / step), endpoint=False)
    pts.append(centre + HOOK_BEND_R * np.column_stack([np.cos(a), np.zeros_like(a), np.sin(a)]))
    end_a = math.radians(HOOK_END_DEG)
    start = centre + HOOK_BEND_R * np.array([math.cos(end_a), 0.0, math.sin(end_a)])
    direction = np.array([-math.sin(end_a), 0.0, math.cos(end_a)])
    tip = np.linspace(0.0, 0.014, 9)[:, None]
    pts.append(start + tip * direction)
    return np.vstack(pts)


def build_hook():
    """A round bar forged into a hook, tapering towards the tip."""
    path = hook_path()
    arclen = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(path, axis=0), axis=1))])
    s = arclen / arclen[-1]
    radii = 0.0075 - 0.003 * np.clip((s - 0.55) / 0.45, 0.0, 1.0) ** 1.5
    return sweep(path, radii, 20, squash=0.85)


def build_stone():
    """River stone 'scanned': flattened icosphere, pebble-scale shape noise, fine scan noise, open underside."""
    bm = bmesh.new()
    bmesh.ops.create_icosphere(bm, subdivisions=6, radius=1.0)
    bm.verts.ensure_lookup_table()
    unit = np.array([v.co[:] for v in bm.verts], dtype=np.float64)
    bmesh.ops.triangulate(bm, faces=bm.faces[:])
    faces = np.array([[v.index for v in f.verts] for f in bm.faces], dtype=np.int64)
    bm.free()
    axes = np.array([0.066, 0.046, 0.03])
    p = unit * axes
    normal = unit / axes  # gradient of the ellipsoid's implicit function
    normal /= np.linalg.norm(normal, axis=1, keepdims=True)
    rng = np.random.default_rng(SEED)
    shape = fourier_noise(p, rng, 48, 0.05, 0.0025)  # the stone's own lumps: kept by smoothing
    scan = fourier_noise(p, rng, 160, 0.007, 0.00045)  # scanner ripple: what smoothing removes
    jitter = rng.normal(scale=0.00015, size=len(p))  # per-point scanner noise
    p = p + (shape + scan + jitter)[:, None] * normal
    # the scanner never saw the underside: drop faces whose centre is below the cut
    cut = -0.7 * axes[2]
    faces = faces[(p[faces][:, :, 2] > cut).all(axis=1)]
    faces = _clean_hole_rim(faces)
    used = np.unique(faces)
    remap = np.full(len(p), -1)
    remap[used] = np.arange(len(used))
    p = p[used]
    faces = remap[faces]
    p[:, 2] -= p[:, 2].min()
    return p, faces


def _clean_hole_rim(faces: np.ndarray) -> np.ndarray:
    """Drop faces hanging on the rim of a cut: ears with two open edges and fans meeting at one vertex.

    Leaves a rim where every boundary vertex has exactly two boundary edges (a simple loop)."""
    while True:
        edges = np.sort(np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]]), axis=1)
        _, inverse, counts = np.unique(edges, axis=0, return_inverse=True, return_counts=True)
        open_edge = (counts[inverse.ravel()] == 1).reshape(3, -1).T  # (m, 3) per face edge
        per_vertex = np.bincount(edges[open_edge.T.ravel()].ravel(), minlength=faces.max() + 1)
        bad = (open_edge.sum(axis=1) >= 2) | (per_vertex[faces] > 2).any(axis=1)
        if not bad.any():
            return faces
        faces = faces[~bad]


def build_anvil():
    """Soft clay sculpt of an anvil: boxes and a horn, joined by a voxel remesh, edges slumped by smoothing."""
    parts = [
        grid_box([-0.095, -0.055, 0.0], [0.095, 0.055, 0.03], [1, 1, 1]),  # foot
        grid_box([-0.06, -0.03, 0.02], [0.06, 0.03, 0.125], [1, 1, 1]),  # waist
        grid_box([-0.12, -0.042, 0.115], [0.1, 0.042, 0.165], [1, 1, 1]),  # face and heel
    ]
    # horn: a cone lying along +x, its top flush with the face
    horn_profile = np.array([(0.0, 0.0), (0.024, 0.0), (0.0035, 0.105), (0.0, 0.108)])
    hv, hf = revolve(horn_profile, 32)
    hv = hv[:, [2, 1, 0]]  # z -> x: cone axis along x
    hf = hf[:, ::-1]  # swapping two axes mirrors the part
    hv = hv + np.array([0.095, 0.0, 0.141])
    parts.append((hv, hf))
    v, f = merge_parts(parts)
    obj = mesh_object("anvil_parts", v, f)
    remesh = obj.modifiers.new("join", "REMESH")
    remesh.mode = "VOXEL"
    remesh.voxel_size = 0.0048
    soften = obj.modifiers.new("slump", "SMOOTH")
    soften.factor = 0.9
    soften.iterations = 36
    depsgraph = bpy.context.evaluated_depsgraph_get()
    evaluated = obj.evaluated_get(depsgraph)
    mesh = bpy.data.meshes.new_from_object(evaluated)
    bm = bmesh.new()
    bm.from_mesh(mesh)
    bmesh.ops.triangulate(bm, faces=bm.faces[:])
    bm.verts.ensure_lookup_table()
    verts = np.array([vert.co[:] for vert in bm.verts], dtype=np.float64)
    faces = np.array([[vert.index for vert in face.verts] for face in bm.faces], dtype=np.int64)
    bm.free()
    bpy.data.objects.remove(obj)
    bpy.data.meshes.remove(mesh)
    verts[:, 2] -= verts[:, 2].min()
    return verts, faces


# --------------------------------------------------------------------------- handles and targets


def nearest_vertices(verts: np.ndarray, points: np.ndarray) -> np.ndarray:
    """Index of the vertex nearest to each point, all different (deterministic)."""
    chosen: list[int] = []
    for p in points:
        d = np.linalg.norm(verts - p, axis=1)
        d[chosen] = np.inf
        chosen.append(int(np.argmin(d)))
    return np.array(chosen)


def rotate_about_y(points: np.ndarray, pivot: np.ndarray, degrees: float) -> np.ndarray:
    """Rotate points in the xz-plane about an axis parallel to y through pivot (x towards z positive)."""
    a = math.radians(degrees)
    rel = points - pivot
    out = rel.copy()
    out[:, 0] = rel[:, 0] * math.cos(a) - rel[:, 2] * math.sin(a)
    out[:, 2] = rel[:, 0] * math.sin(a) + rel[:, 2] * math.cos(a)
    return out + pivot


def hook_handles(local: np.ndarray):
    """Hold the shank's top end, bend the tip HOOK_TIP_DEG further about the bend's centre.

    Returns (vertex indices, targets in local coordinates)."""
    top = local[:, 2] > HOOK_TOP - 0.004
    fixed = np.flatnonzero(top)
    fixed = fixed[np.linspace(0, len(fixed) - 1, 6).round().astype(int)]
    path = hook_path()
    tip_end = path[-1]
    near_tip = np.flatnonzero(np.linalg.norm(local - tip_end, axis=1) < 0.009)
    tip = near_tip[np.linspace(0, len(near_tip) - 1, 6).round().astype(int)]
    pivot = np.array([HOOK_BEND_R, 0.0, HOOK_SHANK_END])  # centre of the bend
    idx = np.concatenate([fixed, tip])
    targets = local[idx].copy()
    targets[len(fixed):] = rotate_about_y(local[tip], pivot, HOOK_TIP_DEG)
    return idx, targets


def lantern_handles(local: np.ndarray):
    """Keep the base on the bench, tilt the top: the hanging ring swings LANTERN_TILT_DEG about the base's edge.

    Returns (vertex indices, targets in local coordinates)."""
    base_r = 0.078
    ang = np.linspace(0.0, 2 * np.pi, 8, endpoint=False)
    base_points = np.column_stack([base_r * np.cos(ang), base_r * np.sin(ang), np.zeros_like(ang)])
    fixed = nearest_vertices(local, base_points)
    ring = np.flatnonzero(local[:, 2] > 0.278)
    # six ring vertices spread along the ring
    ring_sorted = ring[np.argsort(np.arctan2(local[ring, 0], local[ring, 2] - local[ring, 2].mean()), kind="stable")]
    moved = ring_sorted[np.linspace(0, len(ring_sorted) - 1, 6).round().astype(int)]
    pivot = np.array([base_r, 0.0, 0.0])
    idx = np.concatenate([fixed, moved])
    targets = local[idx].copy()
    targets[len(fixed):] = rotate_about_y(local[moved], pivot, -LANTERN_TILT_DEG)
    return idx, targets


# --------------------------------------------------------------------------- Blender scene


def mesh_object(name: str, verts: np.ndarray, faces: np.ndarray, collection=None):
    mesh = bpy.data.meshes.new(name)
    mesh.from_pydata(verts.tolist(), [], faces.tolist())
    mesh.update()
    for attr in [a.name for a in mesh.attributes if a.name.startswith(".select")]:
        mesh.attributes.remove(mesh.attributes[attr])  # selection flags only cost file size
    obj = bpy.data.objects.new(name, mesh)
    (collection or bpy.context.scene.collection).objects.link(obj)
    return obj


def material(name: str, colour, roughness: float, metallic: float = 0.0):
    mat = bpy.data.materials.new(name)  # Blender 5 gives new materials a node tree with a Principled BSDF
    bsdf = mat.node_tree.nodes.get("Principled BSDF")
    bsdf.inputs["Base Color"].default_value = (*colour, 1.0)
    bsdf.inputs["Roughness"].default_value = roughness
    bsdf.inputs["Metallic"].default_value = metallic
    mat.diffuse_color = (*colour, 1.0)
    return mat


def world_vertices(obj) -> np.ndarray:
    """(n, 3) float32 vertex positions in world units, as written to the PLY."""
    n = len(obj.data.vertices)
    co = np.empty(n * 3, dtype=np.float32)
    obj.data.vertices.foreach_get("co", co)
    m = np.array(obj.matrix_world, dtype=np.float64)
    world = co.reshape(n, 3).astype(np.float64) @ m[:3, :3].T + m[:3, 3]
    return world.astype(np.float32)


def triangles(obj) -> np.ndarray:
    """(m, 3) vertex indices of the object's faces; every prop is built from triangles only."""
    mesh = obj.data
    sizes = np.empty(len(mesh.polygons), dtype=np.int32)
    mesh.polygons.foreach_get("loop_total", sizes)
    if not np.all(sizes == 3):
        raise RuntimeError(f"{obj.name}: faces other than triangles")
    f = np.empty(len(mesh.loops), dtype=np.int32)
    mesh.loops.foreach_get("vertex_index", f)
    return f.reshape(-1, 3).astype(np.int64)


def write_ply(path: Path, verts: np.ndarray, faces: np.ndarray) -> None:
    """Binary little-endian PLY: float32 x y z, triangle faces as `list uchar int`."""
    header = (
        "ply\nformat binary_little_endian 1.0\ncomment isoclay workshop demo prop, metres\n"
        f"element vertex {len(verts)}\nproperty float x\nproperty float y\nproperty float z\n"
        f"element face {len(faces)}\nproperty list uchar int vertex_indices\nend_header\n"
    )
    face_rec = np.zeros(len(faces), dtype=[("n", "u1"), ("i", "<i4", (3,))])
    face_rec["n"] = 3
    face_rec["i"] = faces
    with open(path, "wb") as fh:
        fh.write(header.encode("ascii"))
        fh.write(np.ascontiguousarray(verts, dtype="<f4").tobytes())
        fh.write(face_rec.tobytes())


def add_handles(obj, idx: np.ndarray, local_shift: np.ndarray) -> dict:
    """Mark handle vertices, add one target empty per handle; return the CLI handle file content.

    idx : (k,) handle vertex indices; local_shift : (k, 3) how far each target lies from its
    vertex, object coordinates (zero rows: held handles)."""
    order = np.argsort(idx)
    idx, local_shift = idx[order], local_shift[order]
    mesh = obj.data
    flags = np.zeros(len(mesh.vertices), dtype=np.int32)
    flags[idx] = 1
    attr = mesh.attributes.new(HANDLE_ATTRIBUTE, "INT", "POINT")
    attr.data.foreach_set("value", flags)
    coll = bpy.data.collections.new(f"{obj.name} targets")
    bpy.context.scene.collection.children.link(coll)
    m = np.array(obj.matrix_world, dtype=np.float64)
    world_v = world_vertices(obj)
    # target = handle + its displacement, so a held handle's target equals the handle bit for bit
    world_t = (world_v[idx].astype(np.float64) + local_shift @ m[:3, :3].T).astype(np.float32)
    for k, (vi, t) in enumerate(zip(idx, world_t)):
        empty = bpy.data.objects.new(f"{obj.name}.target.{k:03d}", None)
        empty.empty_display_type = "SPHERE"
        empty.empty_display_size = 0.006
        empty.location = [float(x) for x in t]
        empty["isoclay_vertex"] = int(vi)
        coll.objects.link(empty)
    return {
        "handles": [[float(x) for x in world_v[i]] for i in idx],
        "targets": [[float(x) for x in t] for t in world_t],
    }


def set_dressing(collection) -> None:
    """Workbench, floor, a sun and a camera looking at the bench: kept light."""
    wood = material("bench wood", (0.33, 0.2, 0.1), 0.7)
    stone_floor = material("floor", (0.28, 0.27, 0.25), 0.9)
    bench_parts = [grid_box([-0.85, -0.35, BENCH_TOP - 0.05], [0.85, 0.35, BENCH_TOP], [1, 1, 1])]
    for sx in (-0.78, 0.72):
        for sy in (-0.29, 0.23):
            bench_parts.append(grid_box([sx, sy, 0.0], [sx + 0.06, sy + 0.06, BENCH_TOP - 0.05], [1, 1, 1]))
    bench = mesh_object("workbench", *merge_parts(bench_parts), collection)
    bench.data.materials.append(wood)
    floor = mesh_object("floor", *grid_box([-2.5, -2.0, -0.02], [2.5, 2.0, 0.0], [1, 1, 1]), collection)
    floor.data.materials.append(stone_floor)

    sun_data = bpy.data.lights.new("sun", "SUN")
    sun_data.energy = 3.0
    sun_data.angle = math.radians(8.0)
    sun = bpy.data.objects.new("sun", sun_data)
    sun.rotation_euler = (math.radians(50.0), math.radians(10.0), math.radians(-35.0))
    collection.objects.link(sun)

    cam_data = bpy.data.cameras.new("camera")
    cam_data.lens = 32.0
    cam = bpy.data.objects.new("camera", cam_data)
    eye, look = Vector((0.0, -1.6, 1.3)), Vector((0.0, 0.0, BENCH_TOP + 0.08))
    cam.location = eye
    cam.rotation_euler = (look - eye).to_track_quat("-Z", "Y").to_euler()
    collection.objects.link(cam)
    scene = bpy.context.scene
    scene.camera = cam
    scene.render.resolution_x, scene.render.resolution_y = 960, 540
    world = bpy.data.worlds.new("workshop air")
    world.node_tree.nodes["Background"].inputs["Color"].default_value = (0.42, 0.4, 0.37, 1.0)
    world.node_tree.nodes["Background"].inputs["Strength"].default_value = 0.6
    scene.world = world


PROPS = {
    "jug": (build_jug, ("glazed clay", (0.55, 0.27, 0.14), 0.45, 0.0)),
    "lantern": (build_lantern, ("wrought iron", (0.07, 0.07, 0.075), 0.55, 0.9)),
    "hook": (build_hook, ("forged iron", (0.1, 0.09, 0.085), 0.5, 0.9)),
    "stone": (build_stone, ("river stone", (0.36, 0.35, 0.33), 0.8, 0.0)),
    "anvil": (build_anvil, ("soft clay", (0.5, 0.47, 0.42), 0.75, 0.0)),
}


def build_scene(out: Path) -> dict:
    """Build everything into a fresh file and write it to `out`; return a summary."""
    bpy.ops.wm.read_factory_settings(use_empty=True)
    scene = bpy.context.scene
    scene.name = "workshop"
    scene.unit_settings.system = "METRIC"
    dressing = bpy.data.collections.new("workshop")
    scene.collection.children.link(dressing)
    props = bpy.data.collections.new("props")
    scene.collection.children.link(props)
    set_dressing(dressing)

    summary = {}
    handles = {"hook": hook_handles, "lantern": lantern_handles}
    for name, (builder, mat_args) in PROPS.items():
        verts, faces = builder()
        obj = mesh_object(name, verts, faces, props)
        x, y = PLACES[name]
        obj.location = (x, y, BENCH_TOP - float(verts[:, 2].min()))  # resting on the bench
        obj.data.materials.append(material(*mat_args))
        obj.data.shade_smooth()
        bpy.context.view_layer.update()  # matrix_world follows the new location
        if name in handles:
            idx, targets = handles[name](verts)
            data = add_handles(obj, idx, targets - verts[idx])
            _write_json(out / f"{name}_handles.json", data)
        world = world_vertices(obj)
        tris = triangles(obj)
        write_ply(out / f"{name}.ply", world, tris)
        summary[name] = {"vertices": len(world), "faces": len(tris)}

    edits = [
        {"prop": "hook", "task": "deform", "mesh": "hook.ply", "handles": "hook_handles.json",
         "what": f"hold the shank, bend the tip {HOOK_TIP_DEG:g} degrees further"},
        {"prop": "lantern", "task": "deform", "mesh": "lantern.ply", "handles": "lantern_handles.json",
         "what": f"keep the base down, tilt the top {LANTERN_TILT_DEG:g} degrees (loose parts move together)"},
        {"prop": "stone", "task": "smooth", "mesh": "stone.ply", "strength": 0.006,
         "what": "remove the scanner's 6 mm ripple, keep the pebble's lumps"},
        {"prop": "anvil", "task": "sharpen", "mesh": "anvil.ply", "amount": 0.6,
         "what": "firm up the slumped edges of the clay sculpt"},
    ]
    _write_json(out / "demo_edits.json", edits)
    blend = (out / "workshop.blend").resolve()
    bpy.context.preferences.filepaths.save_version = 0  # no workshop.blend1 backup beside it
    bpy.ops.wm.save_as_mainfile(filepath=str(blend), compress=True)
    summary["blend_bytes"] = blend.stat().st_size
    return summary


def _write_json(path: Path, data) -> None:
    path.write_text(json.dumps(data, indent=1) + "\n")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Generate the isoclay workshop demo scene and props.")
    parser.add_argument("--out", default=str(Path(__file__).resolve().parent), help="output folder (created if missing)")
    args = parser.parse_args(argv)
    out = Path(args.out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        sys.stderr.write(f"error: cannot create output folder {out} ({exc.strerror}): choose a writable --out\n")
        return 2
    summary = build_scene(out)
    print(json.dumps(summary))
    return 0


if __name__ == "__main__":
    sys.exit(main())
