"""Benchmark of smoothing and sharpening against mesh filters run in the same process.

Smooth: a chamfered block (a forge's swage block: flat faces, 45-degree chamfers, corners),
meshed by marching cubes of its exact plane-distance field, gets Gaussian noise along the vertex
normals at two levels; a noisy sphere stands for an organic scan, and the same sphere with its
bottom quarter cut away for an open one. isoclay (fit + smooth + extract, default settings:
creases "auto") and the baselines (trimesh filter_laplacian and filter_taubin (Taubin 1995);
libigl cotangent mean curvature flow (Desbrun, Meyer, Schroeder & Barr 1999); pymeshlab's
two-step smoothing (Belyaev & Ohtake 2003), Taubin smoothing and HC Laplacian smoothing
(Vollmer, Mencl & Mueller 1999)) are scored against the exact clean shape: Chamfer-L1 and
Hausdorff over the bbox diagonal, mean normal error in the feature region (within FEATURE_BAND
of a crease, or of the open rim) and elsewhere, and volume change. Each baseline runs at every
parameter of a small sweep and reports its best value per figure, with its time.

Sharpen: rounded blocks (fillets of 5% to 36% of the side); distance to the exact sharp block
before and after, dihedral angle across an edge at fixed probes, corner gap, flat-face normal
error, output size, and pymeshlab's unsharp-mask filter beside it; a sphere's radius change.

Speed: a 50k-vertex prop (the procedural anvil block), fit included, at the default settings:
sharpen, and smooth at 1% of the diagonal (the default) and at the strengths that win (4% and
8%), each against pymeshlab's two-step smoothing on the same mesh in the same run.
"""

from __future__ import annotations

import time

import numpy as np

from ..mesh.types import TriangleMesh

#: Half sizes of the block and width of its chamfers (unit box: longest side 1).
BLOCK_HALF = (0.5, 0.32, 0.24)
CHAMFER = 0.07
#: Points whose closest clean point lies within this distance of a crease form the feature region.
FEATURE_BAND = 0.02
#: Crease threshold: edges of the clean block whose faces' normals differ by more than this.
CREASE_DEGREES = 10.0
#: The strength (unit box) at which the JSON's ratios are reported.
RATIO_STRENGTH = 0.03


# ----------------------------------------------------------------------------- test solid


def block_planes(half=BLOCK_HALF, chamfer=CHAMFER) -> tuple[np.ndarray, np.ndarray]:
    """Planes n . x <= d of the chamfered block: 6 faces, 12 edge chamfers, 8 corner facets."""
    a = np.asarray(half, dtype=np.float64)
    normals, offsets = [], []
    for axis in range(3):
        for sign in (-1.0, 1.0):
            n = np.zeros(3)
            n[axis] = sign
            normals.append(n)
            offsets.append(a[axis])
    for i, j in ((0, 1), (0, 2), (1, 2)):
        for si in (-1.0, 1.0):
            for sj in (-1.0, 1.0):
                n = np.zeros(3)
                n[i], n[j] = si, sj
                normals.append(n / np.sqrt(2.0))
                offsets.append((a[i] + a[j] - chamfer) / np.sqrt(2.0))
    for sx in (-1.0, 1.0):
        for sy in (-1.0, 1.0):
            for sz in (-1.0, 1.0):
                n = np.array([sx, sy, sz])
                normals.append(n / np.sqrt(3.0))
                offsets.append((a.sum() - 1.5 * chamfer) / np.sqrt(3.0))
    return np.array(normals), np.array(offsets)


def block_mesh_exact() -> tuple[TriangleMesh, np.ndarray]:
    """The clean block as a convex polytope mesh and its crease segments (k, 2, 3)."""
    import scipy.spatial

    normals, offsets = block_planes()
    hs = scipy.spatial.HalfspaceIntersection(np.column_stack([normals, -offsets]), np.zeros(3))
    hull = scipy.spatial.ConvexHull(hs.intersections)
    verts = hull.points
    faces = hull.simplices.copy()
    centre = verts[faces].mean(axis=1)
    fn = np.cross(verts[faces[:, 1]] - verts[faces[:, 0]], verts[faces[:, 2]] - verts[faces[:, 0]])
    flip = (fn * centre).sum(1) < 0
    faces[flip] = faces[flip][:, ::-1]
    mesh = TriangleMesh(verts, faces.astype(np.int64))
    return mesh, crease_segments(mesh)


def crease_segments(mesh: TriangleMesh, degrees: float = CREASE_DEGREES) -> np.ndarray:
    """(k, 2, 3) edges whose two faces' normals differ by more than `degrees`."""
    from ..tasks.base import face_normals

    f = mesh.faces
    fn = face_normals(mesh.vertices, f)
    edges = np.concatenate([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]])
    owner = np.tile(np.arange(len(f)), 3)
    key = np.sort(edges, axis=1)
    order = np.lexsort((key[:, 1], key[:, 0]))
    key, owner = key[order], owner[order]
    same = np.all(key[1:] == key[:-1], axis=1)
    i = np.flatnonzero(same)
    cos = (fn[owner[i]] * fn[owner[i + 1]]).sum(1)
    sharp = i[cos < np.cos(np.radians(degrees))]
    return mesh.vertices[key[sharp]]


def block_field():
    """Exact-on-the-surface field of the block: max over its planes (a PlaneMax SDF)."""
    import torch

    from ..field.base import SDFField

    normals, offsets = block_planes()

    class _BlockSDF(SDFField):
        kind = "bench_block"

        def __init__(self):
            super().__init__()
            self.register_buffer("n", torch.tensor(normals, dtype=torch.float32))
            self.register_buffer("d", torch.tensor(offsets, dtype=torch.float32))

        def config(self):
            return {}

        def forward(self, p):
            return (p @ self.n.T - self.d).max(dim=1).values

    return _BlockSDF()


def block_scan(resolution: int, noise_rel: float, seed: int = 0) -> TriangleMesh:
    """Marching-cubes mesh of the block (about 50k vertices at resolution 150) with Gaussian
    noise of standard deviation noise_rel * bbox diagonal along the vertex normals."""
    from ..extract import extract_mesh
    from ..mesh import measures

    half = np.asarray(BLOCK_HALF)
    mesh = extract_mesh(block_field(), -half - 0.03, half + 0.03, resolution)
    return add_normal_noise(mesh, noise_rel * measures.bbox_diagonal(mesh.vertices), seed)


def add_normal_noise(mesh: TriangleMesh, sigma: float, seed: int) -> TriangleMesh:
    """Move each vertex along its area-weighted normal by N(0, sigma^2)."""
    v, f = mesh.vertices, mesh.faces
    fn = np.cross(v[f[:, 1]] - v[f[:, 0]], v[f[:, 2]] - v[f[:, 0]])
    vn = np.zeros_like(v)
    for k in range(3):
        np.add.at(vn, f[:, k], fn)
    vn /= np.maximum(np.linalg.norm(vn, axis=1, keepdims=True), 1e-300)
    rng = np.random.default_rng(seed)
    return TriangleMesh(v + vn * rng.normal(scale=sigma, size=(len(v), 1)), f)


# ----------------------------------------------------------------------------- scoring


def _segment_distance(points: np.ndarray, segments: np.ndarray) -> np.ndarray:
    """(n,) distance from points to the nearest of (k, 2, 3) segments."""
    best = np.full(len(points), np.inf)
    for a, b in segments:
        ab = b - a
        t = np.clip(((points - a) @ ab) / max(ab @ ab, 1e-300), 0.0, 1.0)
        d = np.linalg.norm(points - (a + t[:, None] * ab), axis=1)
        np.minimum(best, d, out=best)
    return best


def normal_errors(result: TriangleMesh, clean: TriangleMesh, creases: np.ndarray, count: int = 60_000, seed: int = 0):
    """Mean angle (degrees) between result and clean normals, in the feature and the flat region.

    Points are sampled on the result by area; each is matched to the closest clean triangle
    (libigl point_mesh_squared_distance); it belongs to the feature region when that closest
    point lies within FEATURE_BAND of a crease.
    """
    import igl

    from ..field.supervision import sample_surface
    from ..tasks.base import face_normals

    pts, normals = sample_surface(result, count, np.random.default_rng(seed))
    _, face, closest = igl.point_mesh_squared_distance(pts, clean.vertices, clean.faces)
    ref = face_normals(clean.vertices, clean.faces)[face]
    angle = np.degrees(np.arccos(np.clip((normals * ref).sum(1), -1.0, 1.0)))
    feature = _segment_distance(closest, creases) < FEATURE_BAND
    return float(angle[feature].mean()), float(angle[~feature].mean())


def score(result: TriangleMesh, clean: TriangleMesh, creases: np.ndarray) -> dict:
    from ..mesh import measures
    from ..mesh.compare import surface_distance

    d = surface_distance(result, clean, count=60_000)
    feat, flat = normal_errors(result, clean, creases)
    vol = measures.signed_volume(result.vertices, result.faces) / measures.signed_volume(clean.vertices, clean.faces) - 1.0
    return {
        "chamfer_rel": d.chamfer_rel,
        "hausdorff_rel": d.hausdorff_rel,
        "normal_error_feature_deg": feat,
        "normal_error_flat_deg": flat,
        "volume_change": vol,
    }


# ----------------------------------------------------------------------------- baselines


def igl_mean_curvature_flow(mesh: TriangleMesh, step: float, iterations: int) -> TriangleMesh:
    """Implicit cotangent mean curvature flow: (M - step L) V' = M V, mass matrix rebuilt each
    iteration (Desbrun et al. 1999; libigl cotmatrix / massmatrix as in libigl's tutorial 205)."""
    import igl
    import scipy.sparse.linalg

    v = mesh.vertices.copy()
    f = mesh.faces
    lap = igl.cotmatrix(v, f)
    for _ in range(iterations):
        mass = igl.massmatrix(v, f, igl.MASSMATRIX_TYPE_BARYCENTRIC)
        v = scipy.sparse.linalg.spsolve((mass - step * lap).tocsc(), mass @ v)
    return TriangleMesh(v, f)


def _trimesh_filter(mesh: TriangleMesh, kind: str, iterations: int) -> TriangleMesh:
    import trimesh

    tm = trimesh.Trimesh(mesh.vertices.copy(), mesh.faces.copy(), process=False)
    if kind == "laplacian":
        trimesh.smoothing.filter_laplacian(tm, lamb=0.5, iterations=iterations, volume_constraint=True)
    else:
        trimesh.smoothing.filter_taubin(tm, lamb=0.5, nu=0.53, iterations=iterations)
    return TriangleMesh(np.asarray(tm.vertices, dtype=np.float64), mesh.faces)


def _pymeshlab_filter(mesh: TriangleMesh, kind: str, steps: int) -> TriangleMesh:
    """pymeshlab's smoothing filters: two-step (Belyaev & Ohtake 2003), Taubin (1995), HC Laplacian."""
    import pymeshlab

    ms = pymeshlab.MeshSet()
    ms.add_mesh(pymeshlab.Mesh(np.ascontiguousarray(mesh.vertices), np.ascontiguousarray(mesh.faces.astype(np.int32))))
    if kind == "two_step":
        ms.apply_coord_two_steps_smoothing(stepsmoothnum=steps, normalthr=60.0, stepnormalnum=20, stepfitnum=20)
    elif kind == "taubin":
        ms.apply_coord_taubin_smoothing(lambda_=0.5, mu=-0.53, stepsmoothnum=steps)
    else:
        for _ in range(steps):
            ms.apply_coord_hc_laplacian_smoothing()
    return TriangleMesh(np.asarray(ms.current_mesh().vertex_matrix(), dtype=np.float64), mesh.faces)


BASELINE_SWEEPS = {
    "trimesh_laplacian": ("iterations", (1, 2, 4, 8, 16)),
    "trimesh_taubin": ("iterations", (5, 10, 20, 40, 80)),
    "igl_cotangent_mcf": ("step", (1e-5, 3e-5, 1e-4, 3e-4, 1e-3)),
    "pymeshlab_two_step": ("steps", (1, 2, 3, 5, 8)),
    "pymeshlab_taubin": ("steps", (5, 10, 20, 40, 80)),
    "pymeshlab_hc_laplacian": ("steps", (1, 2, 4, 8, 16)),
}


def run_baseline(name: str, value, noisy: TriangleMesh) -> TriangleMesh:
    if name == "igl_cotangent_mcf":
        return igl_mean_curvature_flow(noisy, value, 1)
    if name.startswith("pymeshlab_"):
        return _pymeshlab_filter(noisy, name[len("pymeshlab_"):], value)
    return _trimesh_filter(noisy, name.split("_")[1], value)


def baseline_best(noisy: TriangleMesh, clean: TriangleMesh, creases: np.ndarray, quick: bool, scorer=None) -> dict:
    """Each baseline over its sweep: per figure, the best value and the parameter that gave it.
    scorer(result) -> figures (default: score against clean and creases)."""
    scorer = scorer or (lambda res: score(res, clean, creases))
    out = {}
    for name, (param, values) in BASELINE_SWEEPS.items():
        runs = []
        for value in values[1:4] if quick else values:
            t0 = time.perf_counter()
            res = run_baseline(name, value, noisy)
            seconds = time.perf_counter() - t0
            runs.append({param: value, "seconds": seconds, **scorer(res)})
        best = {}
        for key in (k for k in runs[0] if k not in (param, "seconds")):
            # volume change is best nearest zero, every other figure lowest
            r = min(runs, key=lambda x: abs(x[key]) if key == "volume_change" else x[key])
            best[key] = {"value": r[key], param: r[param], "seconds": r["seconds"]}
        out[name] = {"best": best, "runs": runs}
    return out


# ----------------------------------------------------------------------------- isoclay


def isoclay_smooth(noisy: TriangleMesh, strengths, fit_resolution: int = 128, creases: str = "auto") -> tuple[list, float]:
    """Fit once, then smooth + extract at each strength at default settings (unit-box mesh). Returns
    ([(strength, mesh, seconds per stage with total = fit + smooth + extract (+ creases, decimate, trim))], fit seconds)."""
    from ..field.fit import FitConfig, fit_field
    from ..mesh import validate_mesh
    from ..tasks import smooth
    from ..tasks.base import never_stop, no_progress

    t0 = time.perf_counter()
    checked = validate_mesh(noisy).mesh
    fitted = fit_field(checked, FitConfig(resolution=fit_resolution))
    fit_seconds = time.perf_counter() - t0
    out = []
    for strength in strengths:
        t1 = time.perf_counter()
        result = smooth.run(fitted.field, checked, smooth.Config(strength=strength, creases=creases), no_progress, never_stop)
        seconds = {"fit": fit_seconds, **{k: v for k, v in result.seconds.items() if k != "total"},
                   "total": fit_seconds + time.perf_counter() - t1,
                   "flow_steps": result.metrics["flow_steps"], "filter_passes": result.metrics["filter_passes"],
                   "hard_surface": result.metrics["hard_surface"], "faces": result.mesh.n_faces}
        out.append((strength, result.mesh, seconds))
    return out, fit_seconds


def _sphere(subdivisions: int, radius: float = 0.5) -> TriangleMesh:
    import trimesh

    s = trimesh.creation.icosphere(subdivisions=subdivisions, radius=radius)
    return TriangleMesh(np.asarray(s.vertices, dtype=np.float64), np.asarray(s.faces, dtype=np.int64))


def _sphere_score(mesh: TriangleMesh, radius: float = 0.5, rim_z: float | None = None) -> dict:
    """Radial deviation (rms, over the radius) and mean normal error against the analytic sphere;
    with rim_z, the normal error within 0.1 of the cut (rim) and elsewhere."""
    from ..field.supervision import sample_surface

    pts, normals = sample_surface(mesh, 40_000, np.random.default_rng(0))
    r = np.linalg.norm(pts, axis=1)
    angle = np.degrees(np.arccos(np.clip((normals * pts / r[:, None]).sum(1), -1.0, 1.0)))
    out = {"radial_rms_rel": float(np.sqrt(((r - radius) ** 2).mean()) / radius), "normal_error_deg": float(angle.mean())}
    if rim_z is not None:
        rim = pts[:, 2] < rim_z + 0.1
        out.update(normal_error_rim_deg=float(angle[rim].mean()), normal_error_interior_deg=float(angle[~rim].mean()))
    return out


def organic_section(quick: bool) -> dict:
    """A noisy sphere (noise at the vertex spacing) and the same sphere opened at the bottom."""
    from ..extract.footprint import boundary_edge_count

    sphere = _sphere(4 if quick else 5)
    e = sphere.vertices[sphere.faces]
    spacing = float(np.median(np.linalg.norm(e[:, 1] - e[:, 0], axis=1)))
    noisy = add_normal_noise(sphere, 0.3 * spacing, seed=4)
    diagonal = float(np.sqrt(3.0))
    strengths = (2 * spacing,) if quick else (2 * spacing, 0.04 * diagonal)
    entry: dict = {"vertices": noisy.n_vertices, "spacing": spacing, "noisy": _sphere_score(noisy)}
    # the noise as added, at the vertices: area samples of the noisy mesh see its linear
    # interpolation, whose mean square over a triangle is half the vertices' (three barycentric
    # weights of mean square 1/6 each; common practice, no source), so they read about 0.71 of it
    at_vertices = float(np.sqrt(((np.linalg.norm(noisy.vertices, axis=1) - 0.5) ** 2).mean()) / 0.5)
    entry["noisy"]["radial_rms_rel_at_vertices"] = at_vertices
    results, _ = isoclay_smooth(noisy, strengths)
    entry["isoclay"] = [{"strength": st, "seconds": sec, **_sphere_score(m)} for st, m, sec in results]
    entry["baselines"] = baseline_best(noisy, None, None, quick, scorer=_sphere_score)
    best_normal = min(b["best"]["normal_error_deg"]["value"] for b in entry["baselines"].values())
    best_radial = min(b["best"]["radial_rms_rel"]["value"] for b in entry["baselines"].values())
    ours = entry["isoclay"][0]
    entry["ratios"] = {"strength": ours["strength"], "normal_error_vs_best_baseline": ours["normal_error_deg"] / best_normal,
                       "radial_rms_vs_best_baseline": ours["radial_rms_rel"] / best_radial,
                       "radial_rms_vs_input": ours["radial_rms_rel"] / entry["noisy"]["radial_rms_rel"],
                       "radial_rms_vs_input_noise_at_vertices": ours["radial_rms_rel"] / at_vertices}
    # the open scan: bottom quarter cut away
    keep = noisy.vertices[noisy.faces].mean(axis=1)[:, 2] > -0.25
    used = np.unique(noisy.faces[keep])
    remap = np.full(noisy.n_vertices, -1)
    remap[used] = np.arange(len(used))
    scan = TriangleMesh(noisy.vertices[used], remap[noisy.faces[keep]])
    opened, _ = isoclay_smooth(scan, (2 * spacing,))
    st, mesh, sec = opened[0]
    entry["open_scan"] = {"strength": st, "seconds": sec, "open_edges": boundary_edge_count(mesh.faces),
                          "lowest_point": float(mesh.vertices[:, 2].min()), "cut_at": -0.25, **_sphere_score(mesh, rim_z=-0.25)}
    return entry


def _anvil_50k() -> TriangleMesh:
    from .shapes import anvil_block

    return anvil_block(212)  # about 50k vertices


def speed_section(quick: bool) -> dict:
    """Sharpen and smooth (fit included, default settings) on a 50k-vertex prop; pymeshlab's two-step
    smoothing on the same mesh as the in-process reference."""
    from ..field.fit import FitConfig, fit_field
    from ..mesh import validate_mesh
    from ..pipeline import capped_fit_config
    from ..tasks import sharpen, smooth
    from ..tasks.base import never_stop, no_progress

    prop = validate_mesh(_anvil_50k()).mesh
    noisy = add_normal_noise(prop, 0.001 * float(np.linalg.norm(prop.vertices.max(0) - prop.vertices.min(0))), seed=5)
    diagonal = float(np.linalg.norm(prop.vertices.max(0) - prop.vertices.min(0)))
    out: dict = {"vertices": prop.n_vertices, "targets": {"sharpen_seconds": 5.0, "smooth_seconds": 10.0, "winning_strength_vs_default": 2.0}}
    t0 = time.perf_counter()
    field = fit_field(prop, FitConfig()).field
    fit = time.perf_counter() - t0
    res = sharpen.run(field, prop, sharpen.Config(amount=1.0), no_progress, never_stop)
    out["sharpen"] = {"seconds": time.perf_counter() - t0, "fit_seconds": fit, "stages": res.seconds, "faces": res.mesh.n_faces,
                      "roundness_radius": res.metrics["roundness_radius_length"]}
    t0 = time.perf_counter()
    # the fit an edit makes (run_edit caps smooth's field at smooth.FIELD_RESOLUTION)
    fit_config = capped_fit_config(smooth, smooth.Config(strength=0.01 * diagonal), FitConfig())
    field = fit_field(noisy, fit_config).field
    fit = time.perf_counter() - t0
    out["smooth_fit_resolution"] = fit_config.resolution
    out["smooth"] = []
    for share in ((0.01,) if quick else (0.01, 0.04, 0.08)):
        t1 = time.perf_counter()
        r = smooth.run(field, noisy, smooth.Config(strength=share * diagonal), no_progress, never_stop)
        out["smooth"].append({"strength_rel_diagonal": share, "seconds": fit + time.perf_counter() - t1, "stages": r.seconds,
                              "faces": r.mesh.n_faces, "hard_surface": r.metrics["hard_surface"]})
    t1 = time.perf_counter()
    run_baseline("pymeshlab_two_step", 3, noisy)
    out["pymeshlab_two_step_seconds"] = time.perf_counter() - t1
    default = out["smooth"][0]["seconds"]
    out["ratios"] = {"smooth_default_vs_pymeshlab": default / out["pymeshlab_two_step_seconds"],
                     "winning_strength_vs_default": max(x["seconds"] for x in out["smooth"]) / default}
    return out


def run(quick: bool) -> dict:
    """The smooth, sharpen and speed sections of `isoclay bench` (JSON-ready dict)."""
    from ..runtime import configure_torch

    configure_torch()
    clean, creases = block_mesh_exact()
    resolution = 90 if quick else 150
    strengths = (0.03,) if quick else (0.02, 0.03, 0.05, 0.08)
    levels = {"high": 0.004} if quick else {"low": 0.002, "high": 0.004}
    section: dict = {"shape": "chamfered block", "feature_band": FEATURE_BAND, "levels": {}}
    for level, noise in levels.items():
        noisy = block_scan(resolution, noise, seed=1)
        entry: dict = {"noise_rel": noise, "vertices": noisy.n_vertices, "noisy": score(noisy, clean, creases)}
        # default settings: creases "auto" decides from the data (a hard surface here)
        results, _ = isoclay_smooth(noisy, strengths)
        runs = [{"strength": st, "seconds": sec, **score(mesh, clean, creases)} for st, mesh, sec in results]
        entry["isoclay"] = runs
        soft, _ = isoclay_smooth(noisy, (RATIO_STRENGTH,), creases="soft")
        entry["isoclay_soft_creases"] = [{"strength": st, "seconds": sec, **score(mesh, clean, creases)} for st, mesh, sec in soft]
        entry["baselines"] = baseline_best(noisy, clean, creases, quick)
        best_chamfer = min(b["best"]["chamfer_rel"]["value"] for b in entry["baselines"].values())
        best_feature = min(b["best"]["normal_error_feature_deg"]["value"] for b in entry["baselines"].values())
        ours = next(r for r in runs if r["strength"] == RATIO_STRENGTH)
        best = min(runs, key=lambda r: r["normal_error_feature_deg"])
        entry["ratios"] = {
            "strength": RATIO_STRENGTH,
            "chamfer_vs_best_baseline": ours["chamfer_rel"] / best_chamfer,
            "feature_normal_error_vs_best_baseline": ours["normal_error_feature_deg"] / best_feature,
            "seconds_total": ours["seconds"]["total"],
            "best_strength": best["strength"],
            "best_strength_feature_normal_error_vs_best_baseline": best["normal_error_feature_deg"] / best_feature,
        }
        section["levels"][level] = entry
    section["organic"] = organic_section(quick)
    return {"smooth": section, "sharpen": sharpen_section(quick), "speed": speed_section(quick)}


def _probe_edge_angle(field, half, probe: float = 0.02) -> float:
    """Angle (degrees) between the normals at the surface points closest to two probes outside
    the +x/+y edge of a block, one off each face (90 for a sharp edge)."""
    from ..geometry import curvatures, project_to_level_set

    a = np.array([[half[0] + 0.05, half[1] - probe, 0.0]])
    b = np.array([[half[0] - probe, half[1] + 0.05, 0.0]])
    pa, _ = project_to_level_set(field, a)
    pb, _ = project_to_level_set(field, b)
    na, nb = curvatures(field, pa).normal[0], curvatures(field, pb).normal[0]
    return float(np.degrees(np.arccos(np.clip(na @ nb, -1.0, 1.0))))


def _flat_normal_error(mesh: TriangleMesh, half, margin: float) -> float:
    """Mean angle (degrees) between result face normals and the box face normal, on faces whose
    centroid lies more than `margin` from every edge of the box."""
    from ..tasks.base import face_normals

    c = mesh.vertices[mesh.faces].mean(axis=1)
    n = face_normals(mesh.vertices, mesh.faces)
    h = np.asarray(half)
    inset = h[None, :] - np.abs(c)  # distance to each pair of faces
    axis = np.argmin(inset, axis=1)
    others = np.sort(inset, axis=1)[:, 1]
    keep = others > margin
    ref = np.zeros_like(n)
    ref[np.arange(len(c)), axis] = np.sign(c[np.arange(len(c)), axis])
    ang = np.degrees(np.arccos(np.clip((n * ref).sum(1), -1.0, 1.0)))
    return float(ang[keep].mean())


def _box_distance(points: np.ndarray, half) -> np.ndarray:
    """Exact signed distance to the box [-half, half] (common practice, no source)."""
    q = np.abs(points) - np.asarray(half)
    return np.linalg.norm(np.maximum(q, 0.0), axis=1) + np.minimum(q.max(1), 0.0)


def sharpen_section(quick: bool) -> dict:
    """Rounded cubes (fillets 5% to 36% of the side) meshed, fitted, sharpened at default settings."""
    from ..extract import extract_mesh
    from ..field.analytic import RoundedBoxSDF, SphereSDF
    from ..field.fit import FitConfig, fit_field
    from ..field.supervision import sample_surface
    from ..tasks import sharpen
    from ..tasks.base import never_stop, no_progress

    half = np.array([0.5, 0.5, 0.5])

    def cube_distance(mesh):
        pts = sample_surface(mesh, 40_000, np.random.default_rng(0))[0]
        q = np.abs(pts) - half
        return float(np.abs(np.linalg.norm(np.maximum(q, 0.0), axis=1) + np.minimum(q.max(1), 0.0)).mean())

    out: dict = {"shape": "cube of side 1 with rounded edges", "cubes": []}
    for rounding in ((0.05, 0.2) if quick else (0.05, 0.1, 0.2, 0.36)):
        soft = extract_mesh(RoundedBoxSDF(tuple(half), rounding), -half - 0.03, half + 0.03, 96)
        t0 = time.perf_counter()
        field = fit_field(soft, FitConfig()).field
        result = sharpen.run(field, soft, sharpen.Config(amount=1.0), no_progress, never_stop)
        seconds = time.perf_counter() - t0
        entry = {"rounding": rounding, "seconds_with_fit": seconds, "input_faces": soft.n_faces, "faces": result.mesh.n_faces,
                 "detected_radius": result.metrics["roundness_radius_length"],
                 "distance_to_sharp_before": cube_distance(soft), "distance_to_sharp_after": cube_distance(result.mesh),
                 "corner_gap_before": float(np.linalg.norm(soft.vertices - half, axis=1).min()),
                 "corner_gap_after": float(np.linalg.norm(result.mesh.vertices - half, axis=1).min()),
                 "flat_normal_error_deg": _flat_normal_error(result.mesh, half, rounding + 0.05)}
        # grooves and bumps: the result's vertices against the exact sharp cube (deepest inside, farthest out)
        to_sharp = _box_distance(result.mesh.vertices, half)
        entry.update(deepest_inside_sharp=float(-to_sharp.min()), farthest_outside_sharp=float(to_sharp.max()))
        entry["distance_reduction"] = 1.0 - entry["distance_to_sharp_after"] / entry["distance_to_sharp_before"]
        entry["corner_gap_reduction"] = 1.0 - entry["corner_gap_after"] / entry["corner_gap_before"]
        try:  # pymeshlab's unsharp mask on the same mesh, as the mesh-filter reference
            import pymeshlab

            ms = pymeshlab.MeshSet()
            ms.add_mesh(pymeshlab.Mesh(soft.vertices, soft.faces.astype(np.int32)))
            t1 = time.perf_counter()
            ms.apply_coord_unsharp_mask()
            ref = TriangleMesh(np.asarray(ms.current_mesh().vertex_matrix(), dtype=np.float64), soft.faces)
            entry["pymeshlab_unsharp_mask"] = {"seconds": time.perf_counter() - t1, "distance_to_sharp": cube_distance(ref),
                                               "flat_normal_error_deg": _flat_normal_error(ref, half, rounding + 0.05)}
        except ImportError:
            entry["pymeshlab_unsharp_mask"] = None
        out["cubes"].append(entry)
    sphere = extract_mesh(SphereSDF(0.4), np.full(3, -0.45), np.full(3, 0.45), 96)
    field = fit_field(sphere, FitConfig()).field
    res = sharpen.run(field, sphere, sharpen.Config(amount=1.0), no_progress, never_stop)
    r = np.linalg.norm(res.mesh.vertices, axis=1)
    out["sphere_radius_0.4_after"] = {"mean": float(r.mean()), "max_abs_error": float(np.abs(r - 0.4).max())}
    return out
