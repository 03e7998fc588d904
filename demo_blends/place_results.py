"""Put edit results beside their originals in a copy of the workshop scene (Blender as a Python module).

    .venv-blender/bin/python demo_blends/place_results.py --scene demo_blends/workshop.blend \
        --results results.json --out demo_out/workshop_results.blend

results.json : [{"prop": "hook", "result": "hook_result.ply"}, ...]; relative paths are taken
from the folder of results.json. Each result becomes "<prop> (isoclay)", with the original's
transform and materials, moved sideways by 1.2 times the original's width so both are seen
side by side; float vertex properties "stretch" and "bend" become point colour attributes.
Bad input: one line on stderr, exit code 2.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from render_views import BadInput, read_ply  # noqa: E402  (our own PLY reader, numpy only)


def place(scene_path: Path, results: list[dict], base: Path, out: Path) -> list[str]:
    import bpy

    bpy.ops.wm.open_mainfile(filepath=str(scene_path))
    placed = []
    for entry in results:
        source = bpy.data.objects.get(entry["prop"])
        if source is None or source.type != "MESH":
            raise BadInput(f"{scene_path.name} has no mesh object named {entry['prop']!r}; regenerate the scene")
        ply = read_ply((base / entry["result"]).resolve())
        mesh = bpy.data.meshes.new(f"{entry['prop']} (isoclay)")
        mesh.vertices.add(len(ply.vertices))
        mesh.vertices.foreach_set("co", ply.vertices.astype(np.float32).ravel())
        mesh.loops.add(3 * len(ply.faces))
        mesh.loops.foreach_set("vertex_index", ply.faces.astype(np.int32).ravel())
        mesh.polygons.add(len(ply.faces))
        mesh.polygons.foreach_set("loop_start", np.arange(0, 3 * len(ply.faces), 3, dtype=np.int32))
        mesh.polygons.foreach_set("loop_total", np.full(len(ply.faces), 3, dtype=np.int32))
        for name in ("stretch", "bend", "moved"):
            if name in ply.values:
                values = ply.values[name].astype(np.float32)
                top = float(np.percentile(values, 98)) or 1.0
                attr = mesh.color_attributes.new(f"isoclay_{name}", "FLOAT_COLOR", "POINT")
                t = np.clip(values / top, 0, 1)
                rgba = np.stack([t, 0.2 * np.ones_like(t), 1 - t, np.ones_like(t)], axis=1).astype(np.float32)
                attr.data.foreach_set("color", rgba.ravel())
        mesh.update()
        mesh.validate()
        for mat in source.data.materials:
            mesh.materials.append(mat)
        obj = bpy.data.objects.new(mesh.name, mesh)
        obj.matrix_world = source.matrix_world.copy()
        width = max(source.dimensions.x, 0.05)
        obj.location.x += 1.2 * width
        for collection in source.users_collection:
            collection.objects.link(obj)
        placed.append(obj.name)
    bpy.ops.wm.save_as_mainfile(filepath=str(out), compress=True)
    return placed


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Place edit results beside their originals in the workshop scene.")
    parser.add_argument("--scene", required=True)
    parser.add_argument("--results", required=True)
    parser.add_argument("--out", required=True)
    args = parser.parse_args(argv)
    try:
        scene = Path(args.scene)
        if not scene.is_file():
            raise BadInput(f"{scene}: no such scene file; run demo_blends/make_workshop.py")
        try:
            results = json.loads(Path(args.results).read_text())
        except (OSError, ValueError) as exc:
            raise BadInput(f"{args.results}: cannot read the results list ({exc})") from None
        if not isinstance(results, list) or not all(isinstance(r, dict) and {"prop", "result"} <= set(r) for r in results):
            raise BadInput(f"{args.results}: expected a list of {{prop, result}} objects")
        placed = place(scene, results, Path(args.results).resolve().parent, Path(args.out).resolve())
    except BadInput as exc:
        sys.stderr.write(f"error: {exc}\n")
        return 2
    sys.stdout.write(json.dumps({"blend": str(Path(args.out).resolve()), "objects": placed}) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
