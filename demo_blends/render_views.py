"""Render before / after / heat-map pictures of edited meshes with Cycles on the CPU.

Run with Blender as a Python module (no torch here):

    .venv-blender/bin/python demo_blends/render_views.py --pairs pairs.json --out DIR [--size 320x240] [--samples 8]

pairs.json : [{"name": "hook", "before": "hook.ply", "after": "hook_deformed.ply"}, ...]
    name    letters, digits, "_" or "-": the pictures are DIR/<name>_before.png, _after.png, _heat.png
    before, after : PLY files (ASCII or binary); relative paths are taken from the folder of pairs.json
    property (optional) : which float vertex property of the after mesh colours the heat map;
        by default the first of "stretch", "bend" that the file carries.
Both pictures of a pair share one camera framed on the union of the two bounding boxes. The heat
view shows the after mesh coloured by its distortion values (0 up to their 98th percentile, dark violet
to yellow, viridis); a mesh without such values is drawn in a neutral grey and the output says so.

Besides the three pictures, each pair gets DIR/<name>_sheet.png (before | after | heat side by side,
with the heat colour bar, low on the left, high on the right, under the heat view) and all pairs
together DIR/overview.png, one strip per pair.

Prints one JSON object to stdout: the written PNG paths, the heat property and range, the camera
(so a caller can project points exactly as Blender does) and seconds per picture. Bad input (missing
or unreadable file, malformed pairs.json, bad option) gives one line on stderr and exit code 2.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import re
import sys
import time
from pathlib import Path

import numpy as np

#: Float vertex properties that count as distortion, in order of preference.
HEAT_PROPERTIES = ("stretch", "bend")
#: Name of the colour attribute that carries the normalised heat value to the material.
HEAT_ATTRIBUTE = "isoclay_heat"


def _addon_colours():
    """The add-on's distortion colour map (addon/isoclay_blender/colours.py, numpy only): one source
    for the viewport's distortion view and these pictures."""
    import importlib.util

    path = Path(__file__).resolve().parent.parent / "addon" / "isoclay_blender" / "colours.py"
    spec = importlib.util.spec_from_file_location("isoclay_colours", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


_COLOURS = _addon_colours()
#: Heat colour ramp: (position, linear RGB) from no distortion (dark violet) to the most (yellow):
#: viridis, perceptually uniform, the same stops as the add-on's distortion view.
RAMP = tuple((float(t), tuple(float(c) for c in _COLOURS.srgb_to_linear(rgb)))
             for t, rgb in zip(np.linspace(0.0, 1.0, len(_COLOURS.RAMP_SRGB)), _COLOURS.RAMP_SRGB))
#: Direction from the framed object's centre towards the camera (front, a little right and above).
VIEW_DIRECTION = (0.38, -1.0, 0.42)
#: Fraction of the picture left free around the object on each side.
MARGIN = 0.07

PLY_TYPES = {
    "char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1",
    "short": "i2", "int16": "i2", "ushort": "u2", "uint16": "u2",
    "int": "i4", "int32": "i4", "uint": "u4", "uint32": "u4",
    "float": "f4", "float32": "f4", "double": "f8", "float64": "f8",
}


class BadInput(Exception):
    """Input the user must fix; the message is one line naming the problem and what to do."""


# --------------------------------------------------------------------------- PLY reading (numpy only)


class PlyMesh:
    """vertices (n, 3) float64, faces (m, 3) int64 (polygons fanned into triangles), values {name: (n,) float64}."""

    def __init__(self, vertices, faces, values):
        self.vertices, self.faces, self.values = vertices, faces, values


def read_ply(path: Path) -> PlyMesh:
    """Read a PLY file's vertices, faces and extra scalar vertex properties; raise BadInput on any problem."""
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise BadInput(f"{path}: no such file; check the path in the pairs file") from None
    except OSError as exc:
        raise BadInput(f"{path}: cannot be read ({exc.strerror}); check its permissions") from None
    try:
        return _parse_ply(data)
    except BadInput as exc:
        raise BadInput(f"{path.name}: {exc}; export it again as PLY") from None
    except (ValueError, IndexError, UnicodeDecodeError) as exc:
        raise BadInput(f"{path.name}: not a readable PLY file ({exc}); export it again as PLY") from None


def _parse_ply(data: bytes) -> PlyMesh:
    if not data.startswith(b"ply"):
        raise BadInput("does not start with 'ply'")
    end = data.find(b"end_header")
    if end < 0:
        raise BadInput("header has no end_header line")
    body_start = data.index(b"\n", end) + 1
    lines = data[:end].decode("ascii").replace("\r", "").split("\n")
    fmt, elements = None, []
    for line in lines[1:]:
        words = line.split()
        if not words or words[0] in ("comment", "obj_info"):
            continue
        if words[0] == "format":
            fmt = words[1]
        elif words[0] == "element":
            if int(words[2]) < 0:
                raise BadInput(f"element {words[1]} has a negative count")
            elements.append({"name": words[1], "count": int(words[2]), "props": []})
        elif words[0] == "property":
            if not elements:
                raise BadInput("property before any element in the header")
            if words[1] == "list":
                elements[-1]["props"].append((words[4], "list", _ply_type(words[2]), _ply_type(words[3])))
            else:
                elements[-1]["props"].append((words[2], _ply_type(words[1]), None, None))
    if fmt not in ("ascii", "binary_little_endian", "binary_big_endian"):
        raise BadInput(f"unknown PLY format {fmt!r}")
    names = [e["name"] for e in elements]
    if "vertex" not in names:
        raise BadInput("no vertex element")
    if fmt == "ascii":
        parsed = _parse_ascii(data[body_start:].decode("ascii"), elements)
    else:
        parsed = _parse_binary(data, body_start, elements, "<" if fmt == "binary_little_endian" else ">")
    vert = parsed["vertex"]
    for axis in "xyz":
        if axis not in vert:
            raise BadInput(f"vertex element has no {axis} property")
    vertices = np.column_stack([vert["x"], vert["y"], vert["z"]]).astype(np.float64)
    if not np.isfinite(vertices).all():
        raise BadInput("has NaN or infinite vertex coordinates")
    polys = parsed.get("face", {}).get("vertex_indices", parsed.get("face", {}).get("vertex_index"))
    if not polys:
        raise BadInput("has no faces")
    faces = _fan_triangulate(polys)
    if len(faces) == 0:
        raise BadInput("has no faces")
    if faces.min() < 0 or faces.max() >= len(vertices):
        worst = int(faces.max()) if faces.max() >= len(vertices) else int(faces.min())
        raise BadInput(f"a face uses vertex {worst} but the file has {len(vertices)} vertices (0..{len(vertices) - 1})")
    skip = {"x", "y", "z", "nx", "ny", "nz", "red", "green", "blue", "alpha", "s", "t", "u", "v"}
    values = {
        k: np.asarray(v, dtype=np.float64)
        for k, v in vert.items()
        if k not in skip and not isinstance(v, list) and np.issubdtype(np.asarray(v).dtype, np.floating)
    }
    return PlyMesh(vertices, faces, values)


def _ply_type(word: str) -> str:
    if word not in PLY_TYPES:
        raise BadInput(f"unknown property type {word!r}")
    return PLY_TYPES[word]


def _parse_binary(data: bytes, offset: int, elements, order: str) -> dict:
    out = {}
    for el in elements:
        props, count = el["props"], el["count"]
        if all(kind != "list" for _, kind, _, _ in props):
            dtype = np.dtype([(name, order + kind) for name, kind, _, _ in props])
            need = dtype.itemsize * count
            if offset + need > len(data):
                raise BadInput(f"file ends inside the {el['name']} element (truncated)")
            arr = np.frombuffer(data, dtype=dtype, count=count, offset=offset)
            offset += need
            out[el["name"]] = {name: arr[name] for name in dtype.names}
            continue
        if len(props) == 1 and count > 0:
            # common case: one list per element (faces), all of one size (triangles or quads): vectorised
            name, _, ctype, itype = props[0]
            if offset + np.dtype(ctype).itemsize > len(data):
                raise BadInput(f"file ends inside the {el['name']} element (truncated)")
            size = int(np.frombuffer(data, order + ctype, 1, offset)[0])
            if size >= 3:
                dtype = np.dtype([("n", order + ctype), ("i", order + itype, (size,))])
                need = dtype.itemsize * count
                if offset + need <= len(data):
                    arr = np.frombuffer(data, dtype=dtype, count=count, offset=offset)
                    if np.all(arr["n"] == size):
                        idx = arr["i"].astype(np.int64)
                        fan = np.concatenate([idx[:, [0, k, k + 1]] for k in range(1, size - 1)])
                        out[el["name"]] = {name: [fan]}
                        offset += need
                        continue
        columns: dict = {name: [] for name, _, _, _ in props}
        for _ in range(count):
            if offset >= len(data):
                raise BadInput(f"file ends inside the {el['name']} element (truncated)")
            for name, kind, ctype, itype in props:
                if kind == "list":
                    n = int(np.frombuffer(data, order + ctype, 1, offset)[0])
                    offset += np.dtype(ctype).itemsize
                    columns[name].append(np.frombuffer(data, order + itype, n, offset).astype(np.int64))
                    offset += n * np.dtype(itype).itemsize
                else:
                    columns[name].append(np.frombuffer(data, order + kind, 1, offset)[0])
                    offset += np.dtype(kind).itemsize
        out[el["name"]] = {
            name: col if any(p[0] == name and p[1] == "list" for p in props) else np.array(col)
            for name, col in columns.items()
        }
    return out


def _parse_ascii(text: str, elements) -> dict:
    rows = [line.split() for line in text.split("\n") if line.strip()]
    out, pos = {}, 0
    for el in elements:
        props, count = el["props"], el["count"]
        if pos + count > len(rows):
            raise BadInput(f"file ends inside the {el['name']} element (truncated)")
        columns: dict = {name: [] for name, _, _, _ in props}
        for words in rows[pos:pos + count]:
            k = 0
            for name, kind, _, _ in props:
                if kind == "list":
                    n = int(words[k])
                    columns[name].append(np.array(words[k + 1:k + 1 + n], dtype=np.int64))
                    k += 1 + n
                else:
                    columns[name].append(float(words[k]))
                    k += 1
        pos += count
        out[el["name"]] = {
            name: col if any(p[0] == name and p[1] == "list" for p in props) else np.array(col)
            for name, col in columns.items()
        }
    return out


def _fan_triangulate(polys) -> np.ndarray:
    if len(polys) == 1 and isinstance(polys[0], np.ndarray) and polys[0].ndim == 2:
        return polys[0]
    tris = []
    for p in polys:
        for k in range(1, len(p) - 1):
            tris.append((p[0], p[k], p[k + 1]))
    return np.array(tris, dtype=np.int64).reshape(-1, 3)


# --------------------------------------------------------------------------- input checking


def load_pairs(path: Path) -> list[dict]:
    """Read and check pairs.json; resolve relative mesh paths against its folder."""
    try:
        raw = json.loads(path.read_text())
    except FileNotFoundError:
        raise BadInput(f"{path}: no such pairs file; pass --pairs with a JSON list of before/after meshes") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise BadInput(f"{path}: cannot be read ({exc}); check the file") from None
    except json.JSONDecodeError as exc:
        raise BadInput(f"{path}: not valid JSON (line {exc.lineno}: {exc.msg}); fix the pairs file") from None
    if not isinstance(raw, list) or not raw:
        raise BadInput(f"{path}: expected a non-empty JSON list of {{\"name\", \"before\", \"after\"}} objects")
    pairs, seen = [], set()
    for k, item in enumerate(raw):
        if not isinstance(item, dict):
            raise BadInput(f"{path}: entry {k} is not an object; give name, before and after")
        for key in ("name", "before", "after"):
            if not isinstance(item.get(key), str) or not item[key]:
                raise BadInput(f"{path}: entry {k} has no {key!r} string; give name, before and after")
        name = item["name"]
        if not re.fullmatch(r"[A-Za-z0-9_-]{1,64}", name):
            raise BadInput(f"{path}: entry {k} name {name!r} must be 1-64 letters, digits, '_' or '-' (it names the pictures)")
        if name in seen:
            raise BadInput(f"{path}: name {name!r} appears twice; names must differ (they name the pictures)")
        seen.add(name)
        prop = item.get("property")
        if prop is not None and not isinstance(prop, str):
            raise BadInput(f"{path}: entry {k} 'property' must be a string naming a vertex property")
        resolved = {key: (path.parent / item[key]) if not Path(item[key]).is_absolute() else Path(item[key]) for key in ("before", "after")}
        pairs.append({"name": name, **resolved, "property": prop})
    return pairs


def parse_size(text: str) -> tuple[int, int]:
    m = re.fullmatch(r"(\d+)x(\d+)", text)
    if not m or not (16 <= int(m.group(1)) <= 4096 and 16 <= int(m.group(2)) <= 4096):
        raise BadInput(f"--size {text!r}: give WIDTHxHEIGHT in pixels, each 16 to 4096 (e.g. 320x240)")
    return int(m.group(1)), int(m.group(2))


# --------------------------------------------------------------------------- Blender scene


def setup_scene(width: int, height: int, samples: int, threads: int):
    import bpy

    bpy.ops.wm.read_factory_settings(use_empty=True)
    scene = bpy.context.scene
    scene.render.engine = "CYCLES"
    scene.cycles.device = "CPU"
    scene.cycles.samples = samples
    scene.cycles.use_adaptive_sampling = False
    scene.cycles.use_denoising = False
    scene.cycles.max_bounces = 3
    scene.cycles.seed = 0
    scene.render.threads_mode = "FIXED"
    scene.render.threads = threads
    scene.render.resolution_x, scene.render.resolution_y = width, height
    scene.render.resolution_percentage = 100
    scene.render.image_settings.file_format = "PNG"
    scene.render.image_settings.color_mode = "RGB"
    scene.view_settings.view_transform = "Standard"  # keeps the heat map's colours as given

    world = bpy.data.worlds.new("studio")
    world.node_tree.nodes["Background"].inputs["Color"].default_value = (0.78, 0.78, 0.8, 1.0)
    world.node_tree.nodes["Background"].inputs["Strength"].default_value = 0.7
    scene.world = world
    sun_data = bpy.data.lights.new("key", "SUN")
    sun_data.energy = 3.5
    sun_data.angle = math.radians(10.0)
    sun = bpy.data.objects.new("key", sun_data)
    sun.rotation_euler = (math.radians(40.0), math.radians(0.0), math.radians(-40.0))
    scene.collection.objects.link(sun)

    cam = bpy.data.objects.new("view", bpy.data.cameras.new("view"))
    cam.data.lens = 50.0
    cam.data.sensor_fit = "HORIZONTAL"
    cam.data.sensor_width = 36.0
    scene.collection.objects.link(cam)
    scene.camera = cam

    clay = _surface_material("clay", (0.62, 0.42, 0.3))
    neutral = _surface_material("neutral", (0.25, 0.25, 0.25))
    heat = _heat_material()
    return scene, cam, {"clay": clay, "neutral": neutral, "heat": heat}


def _surface_material(name, colour):
    import bpy

    mat = bpy.data.materials.new(name)
    bsdf = mat.node_tree.nodes["Principled BSDF"]
    bsdf.inputs["Base Color"].default_value = (*colour, 1.0)
    bsdf.inputs["Roughness"].default_value = 0.55
    return mat


def _heat_material():
    """Colour attribute (normalised heat in every channel) -> colour ramp (viridis) -> base colour."""
    import bpy

    mat = bpy.data.materials.new("heat")
    nodes, links = mat.node_tree.nodes, mat.node_tree.links
    bsdf = nodes["Principled BSDF"]
    bsdf.inputs["Roughness"].default_value = 0.6
    attr = nodes.new("ShaderNodeAttribute")
    attr.attribute_type = "GEOMETRY"
    attr.attribute_name = HEAT_ATTRIBUTE
    ramp = nodes.new("ShaderNodeValToRGB")
    stops = RAMP
    elems = ramp.color_ramp.elements
    elems[0].position, elems[0].color = stops[0][0], (*stops[0][1], 1.0)
    elems[1].position, elems[1].color = stops[-1][0], (*stops[-1][1], 1.0)
    for pos, col in stops[1:-1]:
        e = elems.new(pos)
        e.color = (*col, 1.0)
    links.new(attr.outputs["Fac"], ramp.inputs["Fac"])
    links.new(ramp.outputs["Color"], bsdf.inputs["Base Color"])
    return mat


def mesh_object(scene, name: str, mesh_data: PlyMesh, mat):
    import bpy

    v, f = mesh_data.vertices, mesh_data.faces
    mesh = bpy.data.meshes.new(name)
    mesh.vertices.add(len(v))
    mesh.vertices.foreach_set("co", v.astype(np.float32).ravel())
    mesh.loops.add(3 * len(f))
    mesh.loops.foreach_set("vertex_index", f.astype(np.int32).ravel())
    mesh.polygons.add(len(f))
    mesh.polygons.foreach_set("loop_start", np.arange(0, 3 * len(f), 3, dtype=np.int32))
    mesh.update(calc_edges=True)
    mesh.shade_smooth()
    mesh.materials.append(mat)
    obj = bpy.data.objects.new(name, mesh)
    scene.collection.objects.link(obj)
    return obj


def set_heat(obj, values) -> tuple[float, float]:
    """Store values scaled to 0..1 in the heat colour attribute; return the (low, high) mapped to 0 and 1."""
    values = np.nan_to_num(np.asarray(values, dtype=np.float64), nan=0.0, posinf=0.0, neginf=0.0)
    lo = 0.0 if values.min() >= 0 else float(np.percentile(values, 2))
    hi = float(np.percentile(values, 98))
    if hi <= lo:
        hi = float(values.max()) if values.max() > lo else lo + 1e-12
    t = np.clip((values - lo) / (hi - lo), 0.0, 1.0).astype(np.float32)
    attr = obj.data.color_attributes.new(HEAT_ATTRIBUTE, "FLOAT_COLOR", "POINT")
    rgba = np.column_stack([t, t, t, np.ones_like(t)])
    attr.data.foreach_set("color", rgba.ravel())
    return lo, hi


def frame_camera(cam, lo: np.ndarray, hi: np.ndarray, width: int, height: int) -> None:
    """Place the camera along VIEW_DIRECTION so the box [lo, hi] fills the picture up to MARGIN."""
    from mathutils import Vector

    centre = (lo + hi) / 2
    d = np.array(VIEW_DIRECTION, dtype=np.float64)
    d /= np.linalg.norm(d)
    rot = Vector(tuple(-d)).to_track_quat("-Z", "Y")
    m = np.array(rot.to_matrix(), dtype=np.float64)
    right, up = m[:, 0], m[:, 1]
    tan_x = (cam.data.sensor_width / 2) / cam.data.lens * (1 - 2 * MARGIN)
    tan_y = tan_x * height / width
    corners = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1]) for z in (lo[2], hi[2])]) - centre
    along = corners @ d
    dist = max(np.max(along + np.abs(corners @ right) / tan_x), np.max(along + np.abs(corners @ up) / tan_y))
    dist = max(dist, 1e-3)
    cam.location = Vector(tuple(centre + d * dist))
    cam.rotation_euler = rot.to_euler()
    size = float(np.linalg.norm(hi - lo))
    cam.data.clip_start = max(dist - size * 2, dist * 1e-3)
    cam.data.clip_end = dist + size * 2


def render_to(scene, path: Path) -> float:
    import bpy

    scene.render.filepath = str(path)
    start = time.perf_counter()
    bpy.ops.render.render(write_still=True)
    if not path.is_file():
        raise RuntimeError(f"Cycles did not write {path}")
    return time.perf_counter() - start


def render_pair(scene, cam, mats, pair: dict, before: PlyMesh, after: PlyMesh, out: Path, width: int, height: int) -> dict:
    import bpy

    for obj in list(scene.collection.objects):
        if obj.type == "MESH":
            mesh = obj.data
            bpy.data.objects.remove(obj)
            bpy.data.meshes.remove(mesh)
    lo = np.minimum(before.vertices.min(axis=0), after.vertices.min(axis=0))
    hi = np.maximum(before.vertices.max(axis=0), after.vertices.max(axis=0))
    frame_camera(cam, lo, hi, width, height)
    ob_before = mesh_object(scene, f"{pair['name']}_before", before, mats["clay"])
    ob_after = mesh_object(scene, f"{pair['name']}_after", after, mats["clay"])

    prop = pair["property"]
    note = None
    if prop is None:
        prop = next((p for p in HEAT_PROPERTIES if p in after.values), None)
        if prop is None:
            note = f"{pair['after'].name} has no {' or '.join(HEAT_PROPERTIES)} values: heat view drawn in neutral grey"
    elif prop not in after.values:
        note = f"{pair['after'].name} has no {prop!r} values: heat view drawn in neutral grey"
        prop = None
    heat_range = None
    if prop is not None:
        heat_range = set_heat(ob_after, after.values[prop])

    names = {k: out / f"{pair['name']}_{k}.png" for k in ("before", "after", "heat")}
    seconds = {}
    ob_after.hide_render = True
    seconds["before"] = render_to(scene, names["before"])
    ob_before.hide_render, ob_after.hide_render = True, False
    seconds["after"] = render_to(scene, names["after"])
    ob_after.data.materials[0] = mats["heat"] if prop is not None else mats["neutral"]
    seconds["heat"] = render_to(scene, names["heat"])
    if note:
        sys.stderr.write(f"note: {note}\n")
    return {
        "name": pair["name"],
        "before": str(names["before"]),
        "after": str(names["after"]),
        "heat": str(names["heat"]),
        "heat_property": prop,
        "heat_range": list(heat_range) if heat_range else None,
        "note": note,
        "seconds": {k: round(v, 3) for k, v in seconds.items()},
        "camera": {
            "matrix_world": [list(row) for row in cam.matrix_world],
            "lens": cam.data.lens,
            "sensor_width": cam.data.sensor_width,
            "sensor_fit": cam.data.sensor_fit,
            "clip": [cam.data.clip_start, cam.data.clip_end],
            "resolution": [width, height],
        },
    }


@contextlib.contextmanager
def _stdout_to_stderr():
    """Send everything written to file descriptor 1 (including C code's output) to stderr meanwhile."""
    sys.stdout.flush()
    saved = os.dup(1)
    os.dup2(2, 1)
    try:
        yield
    finally:
        sys.stdout.flush()
        os.dup2(saved, 1)
        os.close(saved)


def _srgb(linear: np.ndarray) -> np.ndarray:
    """sRGB encoding of linear colour values in 0..1 (IEC 61966-2-1)."""
    linear = np.clip(linear, 0.0, 1.0)
    return np.where(linear <= 0.0031308, 12.92 * linear, 1.055 * linear ** (1 / 2.4) - 0.055)


def _load_pixels(path: Path) -> np.ndarray:
    """(h, w, 4) float pixels of a PNG as stored (bottom row first)."""
    import bpy

    img = bpy.data.images.load(str(path))
    w, h = img.size
    px = np.empty(w * h * 4, dtype=np.float32)
    img.pixels.foreach_get(px)
    bpy.data.images.remove(img)
    return px.reshape(h, w, 4)


def _save_pixels(px: np.ndarray, path: Path) -> None:
    import bpy

    h, w = px.shape[:2]
    img = bpy.data.images.new(path.stem, w, h, alpha=False)
    img.pixels.foreach_set(np.ascontiguousarray(px, dtype=np.float32).ravel())
    img.filepath_raw = str(path)
    img.file_format = "PNG"
    img.save()
    bpy.data.images.remove(img)


def compose_sheet(result: dict, out: Path) -> Path:
    """One strip per pair: before | after | heat, with the heat colour bar (low left, high right) below."""
    gap, bar_h = 4, 8
    panels = [_load_pixels(Path(result[k])) for k in ("before", "after", "heat")]
    h, w = panels[0].shape[:2]
    sheet = np.ones((h + gap + bar_h, 3 * w + 2 * gap, 4), dtype=np.float32)
    for k, panel in enumerate(panels):
        sheet[bar_h + gap:, k * (w + gap):k * (w + gap) + w] = panel
    if result["heat_property"] is not None:
        t = np.linspace(0.0, 1.0, w)
        stops = np.array([pos for pos, _ in RAMP])
        rgb = np.column_stack([np.interp(t, stops, [c[i] for _, c in RAMP]) for i in range(3)])
        sheet[:bar_h, 2 * (w + gap):, :3] = _srgb(rgb)[None]
    else:
        sheet[:bar_h, 2 * (w + gap):, :3] = 0.5
    path = out / f"{result['name']}_sheet.png"
    _save_pixels(sheet, path)
    return path


def compose_overview(sheets: list[Path], out: Path) -> Path:
    """All pair strips stacked, first pair on top."""
    gap = 6
    rows = [_load_pixels(p) for p in sheets]
    width = max(r.shape[1] for r in rows)
    parts = []
    for r in reversed(rows):  # bottom row of pixels first
        padded = np.ones((r.shape[0], width, 4), dtype=np.float32)
        padded[:, :r.shape[1]] = r
        parts += [padded, np.ones((gap, width, 4), dtype=np.float32)]
    path = out / "overview.png"
    _save_pixels(np.concatenate(parts[:-1]), path)
    return path


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Render before/after/heat pictures of edited meshes (Cycles, CPU).")
    parser.add_argument("--pairs", required=True, help="JSON list of {name, before, after[, property]}")
    parser.add_argument("--out", required=True, help="folder for the PNG pictures (created if missing)")
    parser.add_argument("--size", default="320x240", help="picture size WIDTHxHEIGHT (default 320x240)")
    parser.add_argument("--samples", type=int, default=8, help="Cycles samples per pixel (default 8)")
    parser.add_argument("--threads", type=int, default=2, help="CPU threads for Cycles (default 2)")
    args = parser.parse_args(argv)
    try:
        width, height = parse_size(args.size)
        if not 1 <= args.samples <= 4096:
            raise BadInput(f"--samples {args.samples}: give 1 to 4096")
        if not 1 <= args.threads <= 256:
            raise BadInput(f"--threads {args.threads}: give 1 to 256")
        pairs = load_pairs(Path(args.pairs))
        meshes = [(read_ply(p["before"]), read_ply(p["after"])) for p in pairs]  # all checked before any render
        out = Path(args.out)
        try:
            out.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise BadInput(f"{out}: cannot create the output folder ({exc.strerror}); choose a writable --out") from None
    except BadInput as exc:
        sys.stderr.write(f"error: {exc}\n")
        return 2

    start = time.perf_counter()
    with _stdout_to_stderr():  # Blender's render log would spoil the JSON on stdout
        import bpy  # after the checks: a bad call fails fast

        try:
            scene, cam, mats = setup_scene(width, height, args.samples, args.threads)
            results = []
            for pair, (before, after) in zip(pairs, meshes):
                result = render_pair(scene, cam, mats, pair, before, after, out.resolve(), width, height)
                result["sheet"] = str(compose_sheet(result, out.resolve()))
                results.append(result)
            overview = compose_overview([Path(r["sheet"]) for r in results], out.resolve())
            bpy.ops.wm.read_factory_settings(use_empty=True)
        except Exception as exc:  # Cycles or bpy failing is our fault, not the user's: exit 1, one line
            sys.stderr.write(f"error: rendering failed ({type(exc).__name__}: {exc}); please report this\n")
            return 1
    total = time.perf_counter() - start
    print(json.dumps({"pictures": results, "overview": str(overview), "size": [width, height], "samples": args.samples,
                      "seconds_total": round(total, 3)}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
