"""Blender's voxel remesher (OpenVDB) on a PLY file, for the remesh benchmark. Runs in .venv-blender.

    python blender_voxel.py IN.ply OUT.ply VOXEL_SIZE          # import, remesh, export (timed by the caller)
    python blender_voxel.py IN.ply --calibrate VERTICES        # the voxel size giving about that many vertices

Blender's own operators only: wm.ply_import, object.voxel_remesh (with mesh.remesh_voxel_size),
wm.ply_export. Prints one JSON line.
"""

import json
import math
import sys


def _import(path):
    import bpy

    bpy.ops.wm.read_homefile(use_empty=True)
    bpy.ops.wm.ply_import(filepath=path)
    obj = bpy.context.selected_objects[0]
    bpy.context.view_layer.objects.active = obj
    return obj


def _remesh(obj, voxel_size):
    import bpy

    obj.data.remesh_voxel_size = voxel_size
    bpy.ops.object.voxel_remesh()
    return len(obj.data.vertices)


def _area(mesh):
    import bmesh

    bm = bmesh.new()
    bm.from_mesh(mesh)
    area = sum(f.calc_area() for f in bm.faces)
    bm.free()
    return area


def main(argv):
    if len(argv) == 3 and argv[1] == "--calibrate":
        obj = _import(argv[0])
        target = int(argv[2])
        original = obj.data.copy()
        size = math.sqrt(_area(original) / target)  # marching-cubes-like: about one vertex per voxel face
        count = 0
        for _ in range(5):
            obj.data = original.copy()
            count = _remesh(obj, size)
            if abs(count - target) < 0.01 * target:
                break
            size *= math.sqrt(count / target)
        print(json.dumps({"voxel_size": size, "vertices": count}))
        return 0
    src, out, size = argv[0], argv[1], float(argv[2])
    obj = _import(src)
    count = _remesh(obj, size)
    import bpy

    bpy.ops.wm.ply_export(filepath=out, export_selected_objects=True, export_normals=False, export_uv=False,
                          export_colors="NONE", ascii_format=False)
    print(json.dumps({"vertices": count}))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
