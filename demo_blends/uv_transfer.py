"""How well rebuilt results keep the artist's UVs: the workshop props unwrapped, edited through the
installed add-on against a real solver, measured, and rendered with a checker texture (Cycles, CPU).

    .venv-blender/bin/python demo_blends/uv_transfer.py --out demo_out/uv [--quick]

Each prop gets UVs from Blender's Smart UV Project (many islands, so many seams to cross) or, for the
scanned stone, a spherical projection (one island cut along a seam, the way a pebble is usually
mapped), then the edit the demo gives it, rebuilt (not keep topology). Per prop, printed as JSON:
- uv_match: share of result corners whose UV is within 0.01 of the source's UV at the closest
  source point (mathutils BVHTree; the correspondence smoothing and rebuilding promise),
- stretch_median_* / stretch_p95_*: area-weighted median and 95th percentile of the per-face L2
  texture stretch (Sander et al. 2001, "Texture mapping progressive meshes"), each mesh normalised
  to equal surface and UV area; 1.0 is no distortion; source against result says how much the
  carried UVs distort beyond the artist's own unwrap; area_beyond_source_p95: share of the result's
  surface stretched more than the source's 95th percentile,
- flipped: share of result faces whose UV triangle is mirrored against the source's orientation,
- transfer_s: time the add-on spent building the result object (the carrying included).
Writes <out>/uv_transfer.png: source | result per prop, checker-textured through its first UV map.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
EDITS = {  # prop -> (unwrap, operator, scene settings); the demo's own edits, rebuilt
    "stone": ("sphere", "smooth_shape", {"smooth_strength": 0.006}),
    "anvil": ("smart", "sharpen_shape", {"sharpen_amount": 0.6}),
    "jug": ("smart", "remesh_shape", {}),
    "hook": ("smart", "remesh_shape", {}),
}
RENDERED = ("jug", "stone")


def install_addon(tmp: Path):
    import bpy

    dist = tmp / "dist"
    done = subprocess.run([sys.executable, str(ROOT / "addon" / "build.py"), "--dist", str(dist),
                           "--cache", str(ROOT / "build" / "wheels")], capture_output=True, text=True)
    if done.returncode != 0:
        raise SystemExit(f"error: the add-on did not build: {done.stderr.strip()[-300:]}")
    zip_path = next(dist.glob("*linux_x64.zip"))
    repo = next(r for r in bpy.context.preferences.extensions.repos if r.module == "user_default")
    repo.custom_directory = str(tmp / "user" / "extensions" / "user_default")
    repo.use_custom_directory = True
    bpy.ops.extensions.package_install_files(filepath=str(zip_path), repo="user_default", enable_on_install=True)
    name = "bl_ext.user_default.isoclay"
    if name not in bpy.context.preferences.addons:
        raise SystemExit("error: the isoclay extension did not register")
    prefs = bpy.context.preferences.addons[name].preferences
    prefs.python_path = os.environ.get("ISOCLAY_SOLVER_PYTHON", str(ROOT / ".venv" / "bin" / "python"))
    prefs.module_path = str(ROOT / "solver")
    prefs.data_dir = str(tmp / "history")
    return sys.modules[name]


def _array(collection, attr, width, dtype=np.float32):
    buf = np.empty(len(collection) * width, dtype=dtype)
    collection.foreach_get(attr, buf)
    return buf.reshape(-1, width) if width > 1 else buf


def triangles(mesh):
    mesh.calc_loop_triangles()
    lt = mesh.loop_triangles
    return _array(lt, "vertices", 3, np.int32), _array(lt, "loops", 3, np.int32)


def texture_stretch(co, uv, tris, loops) -> tuple[np.ndarray, np.ndarray]:
    """Per-triangle L2 stretch of the map UV -> surface (Sander et al. 2001) with surface and UV areas
    normalised to equal totals, and the triangles' surface areas (triangles with no UV area get inf)."""
    p, q = co[tris].astype(np.float64), uv[loops].astype(np.float64)
    area3 = 0.5 * np.linalg.norm(np.cross(p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]), axis=1)
    d1, d2 = q[:, 1] - q[:, 0], q[:, 2] - q[:, 0]
    area2 = 0.5 * (d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0])
    ok = np.abs(area2) > 1e-14
    out = np.full(len(area3), np.inf)
    weights = area3.copy()
    p, q, area3, area2 = p[ok], q[ok], area3[ok], area2[ok]
    s1, s2, s3 = q[:, 0], q[:, 1], q[:, 2]
    a = 2 * area2
    ss = (p[:, 0] * (s2[:, 1] - s3[:, 1])[:, None] + p[:, 1] * (s3[:, 1] - s1[:, 1])[:, None]
          + p[:, 2] * (s1[:, 1] - s2[:, 1])[:, None]) / a[:, None]
    st = (p[:, 0] * (s3[:, 0] - s2[:, 0])[:, None] + p[:, 1] * (s1[:, 0] - s3[:, 0])[:, None]
          + p[:, 2] * (s2[:, 0] - s1[:, 0])[:, None]) / a[:, None]
    per = np.sqrt(((ss * ss).sum(1) + (st * st).sum(1)) / 2)
    scale = math.sqrt(np.abs(area2).sum() / area3.sum())  # equal surface and UV area
    out[ok] = per * scale
    return out, weights


def weighted_percentile(values, weights, q) -> float:
    order = np.argsort(values)
    cum = np.cumsum(weights[order])
    return float(values[order][np.searchsorted(cum, q / 100.0 * cum[-1])])


def measure(source, result) -> dict:
    from mathutils.bvhtree import BVHTree

    src, res = source.data, result.data
    s_co = _array(src.vertices, "co", 3).astype(np.float64)
    s_tri, s_loops = triangles(src)
    s_uv = _array(src.uv_layers[0].uv, "vector", 2)
    r_co = _array(res.vertices, "co", 3).astype(np.float64)
    r_tri, r_loops = triangles(res)
    r_uv = _array(res.uv_layers[0].uv, "vector", 2)
    tree = BVHTree.FromPolygons(s_co.tolist(), s_tri.tolist())
    expected = np.zeros((len(r_co), 2))
    orient = np.zeros(len(r_co))
    for i, p in enumerate(r_co.tolist()):
        hit, _, t, _ = tree.find_nearest(p)
        a, b, c = s_co[s_tri[t]]
        m = np.array([b - a, c - a]).T
        vw = np.linalg.lstsq(m, np.array(hit) - a, rcond=None)[0]
        w = np.array([1 - vw.sum(), vw[0], vw[1]])
        q = s_uv[s_loops[t]]
        expected[i] = w @ q
        d1, d2 = q[1] - q[0], q[2] - q[0]
        orient[i] = np.sign(d1[0] * d2[1] - d1[1] * d2[0])
    corner_vert = _array(res.loops, "vertex_index", 1, np.int32)
    err = np.abs(r_uv - expected[corner_vert]).max(axis=1)
    q = r_uv[r_loops]
    d1, d2 = q[:, 1] - q[:, 0], q[:, 2] - q[:, 0]
    sign = np.sign(d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0])
    flipped = (sign * orient[r_tri[:, 0]]) < 0
    seams = int(_array(res.edges, "use_seam", 1, bool).sum())
    src, src_w = texture_stretch(s_co, s_uv, s_tri, s_loops)
    res, res_w = texture_stretch(r_co, r_uv, r_tri, r_loops)
    worst = weighted_percentile(src, src_w, 95)
    return {"source_vertices": len(s_co), "result_vertices": len(r_co), "uv_match": float((err <= 0.01).mean()),
            "stretch_median_source": weighted_percentile(src, src_w, 50),
            "stretch_median_result": weighted_percentile(res, res_w, 50),
            "stretch_p95_source": worst, "stretch_p95_result": weighted_percentile(res, res_w, 95),
            "area_beyond_source_p95": float(res_w[res > worst].sum() / res_w.sum()),
            "flipped": float(flipped.mean()), "seams": seams}


def sphere_project(obj) -> None:
    """A UV map by spherical projection about the bounding-box centre; faces across the seam are unwrapped."""
    mesh = obj.data
    co = _array(mesh.vertices, "co", 3).astype(np.float64)
    d = co - (co.min(0) + co.max(0)) / 2
    u = (np.arctan2(d[:, 1], d[:, 0]) / (2 * math.pi)) % 1.0
    v = np.arccos(np.clip(d[:, 2] / np.maximum(np.linalg.norm(d, axis=1), 1e-12), -1, 1)) / math.pi
    corner = _array(mesh.loops, "vertex_index", 1, np.int32)
    start = _array(mesh.polygons, "loop_start", 1, np.int32)
    total = _array(mesh.polygons, "loop_total", 1, np.int32)
    poly = np.repeat(np.arange(len(start)), total)
    cu = u[corner].copy()
    span_max = np.maximum.reduceat(cu, start)
    span_min = np.minimum.reduceat(cu, start)
    wrap = (span_max - span_min > 0.5)[poly]
    cu[wrap & (cu < 0.5)] += 1.0
    layer = mesh.uv_layers.new(name="UVMap")
    layer.uv.foreach_set("vector", np.column_stack([cu, 1.0 - v[corner]]).astype(np.float32).ravel())


def checker_material():
    import bpy

    mat = bpy.data.materials.new("checker")
    mat.use_nodes = True
    nodes, links = mat.node_tree.nodes, mat.node_tree.links
    bsdf = nodes["Principled BSDF"]
    tex = nodes.new("ShaderNodeTexChecker")
    tex.inputs["Scale"].default_value = 24.0
    tex.inputs["Color1"].default_value = (0.9, 0.85, 0.75, 1.0)
    tex.inputs["Color2"].default_value = (0.15, 0.25, 0.45, 1.0)
    uvmap = nodes.new("ShaderNodeUVMap")
    links.new(uvmap.outputs["UV"], tex.inputs["Vector"])
    links.new(tex.outputs["Color"], bsdf.inputs["Base Color"])
    bsdf.inputs["Roughness"].default_value = 0.6
    return mat


def render(pairs, out: Path, size: tuple, samples: int) -> Path:
    """Source | result for each pair, one row per prop, as one PNG."""
    import bpy

    sys.path.insert(0, str(HERE))
    import render_views as rv

    scene = bpy.data.scenes.new("uv transfer")
    scene.render.engine = "CYCLES"
    scene.cycles.device, scene.cycles.samples = "CPU", samples
    scene.cycles.use_denoising, scene.cycles.max_bounces = False, 3
    scene.render.resolution_x, scene.render.resolution_y = size
    scene.render.resolution_percentage = 100
    scene.render.image_settings.file_format, scene.render.image_settings.color_mode = "PNG", "RGB"
    scene.view_settings.view_transform = "Standard"
    world = bpy.data.worlds.new("studio uv")
    world.use_nodes = True
    world.node_tree.nodes["Background"].inputs["Color"].default_value = (0.78, 0.78, 0.8, 1.0)
    scene.world = world
    sun = bpy.data.objects.new("key uv", bpy.data.lights.new("key uv", "SUN"))
    sun.data.energy = 3.5
    sun.rotation_euler = (math.radians(40.0), 0.0, math.radians(-40.0))
    scene.collection.objects.link(sun)
    cam = bpy.data.objects.new("view uv", bpy.data.cameras.new("view uv"))
    cam.data.lens, cam.data.sensor_width = 50.0, 36.0
    scene.collection.objects.link(cam)
    scene.camera = cam
    mat = checker_material()
    shots = []
    for source, result in pairs:
        row = []
        for obj in (source, result):
            copy = bpy.data.objects.new(f"{obj.name} shot", obj.data.copy())
            copy.matrix_world = obj.matrix_world.copy()
            copy.data.materials.clear()
            copy.data.materials.append(mat)
            scene.collection.objects.link(copy)
            world_co = np.array([list(copy.matrix_world @ v.co) for v in copy.data.vertices])
            rv.frame_camera(cam, world_co.min(0), world_co.max(0), *size)
            path = out / f"{obj.name.replace(' ', '_')}_checker.png"
            with bpy.context.temp_override(scene=scene):
                scene.render.filepath = str(path)
                bpy.ops.render.render(write_still=True, scene=scene.name)
            scene.collection.objects.unlink(copy)
            row.append(rv._load_pixels(path))
        shots.append(row)
    gap = 6
    h, w = shots[0][0].shape[:2]
    sheet = np.ones((len(shots) * (h + gap) - gap, 2 * w + gap, 4), dtype=np.float32)
    for k, row in enumerate(reversed(shots)):  # bottom row of pixels first
        y = k * (h + gap)
        sheet[y:y + h, :w], sheet[y:y + h, w + gap:] = row[0], row[1]
    target = out / "uv_transfer.png"
    rv._save_pixels(sheet, target)
    return target


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", required=True, help="folder for the JSON-worthy figures' pictures")
    parser.add_argument("--quick", action="store_true", help="coarser field and fewer samples")
    args = parser.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix="isoclay-uv-"))
    os.environ.setdefault("BLENDER_USER_RESOURCES", str(tmp / "user"))
    import bpy

    try:
        addon = install_addon(tmp)
        bpy.ops.wm.open_mainfile(filepath=str(HERE / "workshop.blend"))
        settings = bpy.context.scene.isoclay
        settings.field_resolution = 64 if args.quick else 128
        settings.surface_auto, settings.surface_resolution = False, 96 if args.quick else 160
        settings.keep_topology, settings.keep_source_visible = False, True
        figures, pairs = {}, []
        timed = {"s": 0.0}
        create = addon.results.create_result_object

        def timed_create(*a, **k):
            t = time.perf_counter()
            try:
                return create(*a, **k)
            finally:
                timed["s"] = time.perf_counter() - t

        addon.results.create_result_object = timed_create
        for name, (unwrap, op, values) in EDITS.items():
            source = bpy.data.objects[name]
            for other in bpy.context.view_layer.objects.selected:
                other.select_set(False)
            source.select_set(True)
            bpy.context.view_layer.objects.active = source
            if unwrap == "sphere":
                sphere_project(source)
            else:
                bpy.ops.object.mode_set(mode='EDIT')
                bpy.ops.mesh.select_all(action='SELECT')
                bpy.ops.uv.smart_project(angle_limit=math.radians(66.0), island_margin=0.02)
                bpy.ops.object.mode_set(mode='OBJECT')
            for key, value in values.items():
                setattr(settings, key, value)
            t = time.perf_counter()
            getattr(bpy.ops.isoclay, op)('EXEC_DEFAULT', True)
            result = bpy.context.active_object
            figures[name] = {"edit": op.split("_")[0], "seconds": time.perf_counter() - t,
                             "transfer_s": timed["s"], **measure(source, result)}
            if name in RENDERED:
                pairs.append((source, result))
        picture = render(pairs, out, (360, 300) if args.quick else (480, 400), 8 if args.quick else 24)
        sys.stdout.write("\n" + json.dumps({"props": figures, "picture": str(picture)}, indent=1) + "\n")
    finally:
        addon_link = sys.modules.get("bl_ext.user_default.isoclay")
        if addon_link is not None:
            addon_link.solver_process.LINK.stop()
        shutil.rmtree(tmp, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
