"""The batch's contact sheet: one PNG with a numbered before | after tile per input.

Two thumbnail renderers:
- "raster" (default): a small z-buffer rasteriser in numpy (below), run on the workers right after
  each item, so thumbnails cost the client nothing and reruns reuse them. Smooth Lambert shading of
  a clay-coloured material under one key light, the same view direction as the demo renders, both
  thumbnails of a tile framed on the union of the two bounding boxes; the inside of an open scan
  shows darker (back faces).
- "cycles": Blender's Cycles through the bpy wheel (demo_blends/render_views.py, as the demo
  renders), run once on the client at the end; needs .venv-blender. Slower (see docs/batch.md for
  the figures) but path traced.
Tiles are composed with Pillow; each carries its number (the summary's ``tile`` column), the input's
name and its status.
"""

from __future__ import annotations

import json
import subprocess
import time
from pathlib import Path

import numpy as np

#: Direction from the object towards the camera (front, a little right and above), as the demo renders use.
VIEW_DIRECTION = (0.38, -1.0, 0.42)
#: Direction towards the key light.
LIGHT_DIRECTION = (0.3, -0.6, 0.75)
#: Clay colour (sRGB 0..1), its inside (back faces), and the background.
CLAY = np.array([0.80, 0.62, 0.48])
INSIDE = np.array([0.35, 0.30, 0.32])
BACKGROUND = np.array([0.88, 0.88, 0.90])
#: Thumbnail size in pixels (width, height) and the supersampling factor for smooth edges.
THUMB_SIZE = (200, 160)
SUPERSAMPLE = 2
#: Fraction of the picture left free around the object.
MARGIN = 0.06
#: Tiles per row of the contact sheet.
COLUMNS = 4


def _camera(view=VIEW_DIRECTION):
    d = np.asarray(view, dtype=np.float64)
    d /= np.linalg.norm(d)
    forward = -d
    right = np.cross(forward, [0.0, 0.0, 1.0])
    right /= np.linalg.norm(right)
    up = np.cross(right, forward)
    return d, right, up


def vertex_normals(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(n, 3) area-weighted unit vertex normals."""
    n = np.cross(vertices[faces[:, 1]] - vertices[faces[:, 0]], vertices[faces[:, 2]] - vertices[faces[:, 0]])
    out = np.zeros_like(vertices)
    for k in range(3):
        np.add.at(out, faces[:, k], n)
    return out / np.maximum(np.linalg.norm(out, axis=1, keepdims=True), 1e-300)


def frame(meshes, size=THUMB_SIZE):
    """A shared framing of several meshes: (centre (3,), pixels per unit) for the view."""
    _, right, up = _camera()
    pts = np.concatenate([m.vertices for m in meshes])
    lo, hi = pts.min(0), pts.max(0)
    centre = (lo + hi) / 2
    corners = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1]) for z in (lo[2], hi[2])]) - centre
    half_w = np.abs(corners @ right).max()
    half_h = np.abs(corners @ up).max()
    w, h = size
    scale = min(w * (1 - 2 * MARGIN) / (2 * max(half_w, 1e-12)), h * (1 - 2 * MARGIN) / (2 * max(half_h, 1e-12)))
    return centre, scale


def render_thumbnail(mesh, centre: np.ndarray, scale: float, size=THUMB_SIZE) -> np.ndarray:
    """(h, w, 3) uint8 picture of ``mesh`` (orthographic view along VIEW_DIRECTION) at ``scale`` pixels per unit."""
    d, right, up = _camera()
    w, h = size[0] * SUPERSAMPLE, size[1] * SUPERSAMPLE
    s = scale * SUPERSAMPLE
    p = mesh.vertices - centre
    xy = np.column_stack([w / 2 + s * (p @ right), h / 2 - s * (p @ up)])
    depth = p @ d
    normals = vertex_normals(mesh.vertices, mesh.faces)
    pix_all, z_all, n_all = [], [], []
    faces = mesh.faces
    tri = xy[faces]  # (m, 3, 2)
    lo = np.floor(tri.min(axis=1)).astype(np.int64)
    extent = (np.floor(tri.max(axis=1)).astype(np.int64) - lo).max(axis=1) + 1
    area = ((tri[:, 1, 0] - tri[:, 0, 0]) * (tri[:, 2, 1] - tri[:, 0, 1])
            - (tri[:, 1, 1] - tri[:, 0, 1]) * (tri[:, 2, 0] - tri[:, 0, 0]))
    usable = np.abs(area) > 1e-12
    start = 0
    for k in (1, 2, 3, 4, 6, 8, 12, 16, 24, 32, 48, 64, 96, 128, 192, 256, 384, 512, 768, 1024, 2048, 4096):
        # triangles whose pixel box fits in k x k: test the k x k pixel centres against each
        sel = np.nonzero(usable & (extent > start) & (extent <= k))[0]
        start = k
        for chunk in np.array_split(sel, max(1, len(sel) * k * k // 2_000_000 + 1)):
            if len(chunk) == 0:
                continue
            oy, ox = np.meshgrid(np.arange(k), np.arange(k), indexing="ij")
            px = lo[chunk, 0][:, None] + ox.ravel()[None]  # (t, k*k)
            py = lo[chunk, 1][:, None] + oy.ravel()[None]
            cx, cy = px + 0.5, py + 0.5
            t = tri[chunk]
            inv = 1.0 / area[chunk][:, None]
            w0 = ((t[:, 1, 0, None] - cx) * (t[:, 2, 1, None] - cy) - (t[:, 1, 1, None] - cy) * (t[:, 2, 0, None] - cx)) * inv
            w1 = ((t[:, 2, 0, None] - cx) * (t[:, 0, 1, None] - cy) - (t[:, 2, 1, None] - cy) * (t[:, 0, 0, None] - cx)) * inv
            w2 = 1.0 - w0 - w1
            hit = (w0 >= 0) & (w1 >= 0) & (w2 >= 0) & (px >= 0) & (px < w) & (py >= 0) & (py < h)
            rows, cols = np.nonzero(hit)
            f = faces[chunk[rows]]
            bary = np.column_stack([w0[rows, cols], w1[rows, cols], w2[rows, cols]])
            pix_all.append(py[rows, cols] * w + px[rows, cols])
            z_all.append((bary * depth[f]).sum(axis=1))
            n_all.append(np.einsum("tc,tcd->td", bary, normals[f]))
    image = np.broadcast_to(BACKGROUND, (h * w, 3)).copy()
    if pix_all:
        pix, z, nrm = np.concatenate(pix_all), np.concatenate(z_all), np.concatenate(n_all)
        order = np.lexsort((-z, pix))
        first = order[np.r_[True, pix[order][1:] != pix[order][:-1]]]  # nearest sample per pixel
        nrm = nrm[first] / np.maximum(np.linalg.norm(nrm[first], axis=1, keepdims=True), 1e-300)
        light = np.asarray(LIGHT_DIRECTION, dtype=np.float64)
        light /= np.linalg.norm(light)
        facing = nrm @ d
        front = facing >= 0
        nrm[~front] *= -1
        diffuse = np.clip(nrm @ light, 0.0, 1.0)
        shade = 0.35 + 0.65 * diffuse
        colour = np.where(front[:, None], CLAY[None] * shade[:, None], INSIDE[None] * shade[:, None])
        image[pix[first]] = colour
    image = image.reshape(h, w, 3)
    image = image.reshape(size[1], SUPERSAMPLE, size[0], SUPERSAMPLE, 3).mean(axis=(1, 3))
    return (np.clip(image, 0, 1) * 255 + 0.5).astype(np.uint8)


def render_pair(before, after, size=THUMB_SIZE) -> tuple[np.ndarray, np.ndarray]:
    """Before and after thumbnails on one framing (uint8 pictures)."""
    centre, scale = frame([before, after], size)
    return render_thumbnail(before, centre, scale, size), render_thumbnail(after, centre, scale, size)


def save_png(image: np.ndarray, path: Path) -> None:
    """Write a picture atomically (temp file, fsync, rename)."""
    import io

    from PIL import Image

    from .store import atomic_write

    buffer = io.BytesIO()
    Image.fromarray(image).save(buffer, format="PNG")
    atomic_write(Path(path), buffer.getvalue())


def cycles_thumbnails(pairs: list[dict], workdir: Path, blender_python: Path, size=THUMB_SIZE, samples: int = 8) -> dict:
    """Render before/after with Cycles (demo_blends/render_views.py) for pairs [{"name", "before", "after"}] (PLY
    files); returns name -> (before PNG, after PNG) and the seconds it took."""
    from ..commands.demo import DEMO_DIR
    from ..errors import InvalidInput

    workdir.mkdir(parents=True, exist_ok=True)
    pairs_file = workdir / "pairs.json"
    pairs_file.write_text(json.dumps(pairs))
    t0 = time.perf_counter()
    done = subprocess.run([str(blender_python), str(DEMO_DIR / "render_views.py"), "--pairs", str(pairs_file), "--out",
                           str(workdir), "--size", f"{size[0]}x{size[1]}", "--samples", str(samples), "--threads", "2"],
                          capture_output=True, text=True)
    if done.returncode != 0:
        lines = [line for line in done.stderr.splitlines() if line.strip()]
        raise InvalidInput(f"Cycles thumbnails failed: {lines[-1] if lines else 'no message'}")
    listing = json.loads(done.stdout)
    # render_views.py also renders a heat view per pair; the before/after renders alone are summed apart
    return {"pictures": {p["name"]: (Path(p["before"]), Path(p["after"])) for p in listing["pictures"]},
            "seconds": time.perf_counter() - t0,
            "before_after_render_seconds": sum(p["seconds"]["before"] + p["seconds"]["after"] for p in listing["pictures"])}


def compose(tiles: list[dict], path: Path, size=THUMB_SIZE, title: str = "") -> Path:
    """Write the contact sheet. tiles: [{"number", "label", "status", "before": image|None, "after": image|None, "note"}]."""
    from PIL import Image, ImageDraw, ImageFont

    w, h = size
    pad, text_h, head = 8, 34, 28 if title else 0
    tile_w, tile_h = 2 * w + 2, h + text_h
    cols = max(1, min(COLUMNS, len(tiles)))
    rows = (len(tiles) + cols - 1) // cols
    sheet = Image.new("RGB", (pad + cols * (tile_w + pad), head + pad + rows * (tile_h + pad)), (255, 255, 255))
    draw = ImageDraw.Draw(sheet)
    font = ImageFont.load_default(13)
    small = ImageFont.load_default(11)
    if title:
        draw.text((pad, 7), title, fill=(30, 30, 30), font=font)
    colours = {"done": (40, 120, 50), "reused": (40, 90, 150), "failed": (180, 40, 30), "cancelled": (120, 120, 120)}
    for k, tile in enumerate(tiles):
        x = pad + (k % cols) * (tile_w + pad)
        y = head + pad + (k // cols) * (tile_h + pad)
        for j, key in enumerate(("before", "after")):
            picture = tile.get(key)
            box = (x + j * (w + 2), y)
            if picture is None:
                sheet.paste(Image.new("RGB", (w, h), (235, 235, 235)), box)
                draw.text((box[0] + 8, y + h // 2 - 7), "no picture" if key == "before" else tile["status"],
                          fill=(120, 120, 120), font=small)
            else:
                sheet.paste(Image.fromarray(picture) if isinstance(picture, np.ndarray) else Image.open(picture).convert("RGB").resize((w, h)), box)
        draw.text((x + 2, y + h + 3), f"{tile['number']}  {tile['label']}"[:48], fill=(20, 20, 20), font=font)
        status = tile["status"] + (f": {tile['note']}" if tile.get("note") and tile["status"] == "failed" else "")
        draw.text((x + 2, y + h + 19), status[:60], fill=colours.get(tile["status"], (0, 0, 0)), font=small)
    import io

    from .store import atomic_write

    buffer = io.BytesIO()
    sheet.save(buffer, format="PNG")
    atomic_write(Path(path), buffer.getvalue())
    return Path(path)


def thumbnail_paths(store, key: str) -> tuple[Path, Path]:
    """Where the raster thumbnails of an item key are kept (beside its result in the store)."""
    return store.results / f"{key}.before.png", store.results / f"{key}.after.png"


def store_thumbnails(store, key: str, before, after) -> None:
    """Render and keep an item's raster thumbnails (run on the worker, right after the item)."""
    pictures = render_pair(before, after)
    for picture, path in zip(pictures, thumbnail_paths(store, key)):
        save_png(picture, path)


def _read_or_none(path):
    from ..mesh.io import read_mesh

    try:
        return read_mesh(path)
    except Exception:  # a broken input gets an empty tile; its reason is in the summary
        return None


def write_contact_sheet(rows, plan, store, blender_python: Path | None = None, info=lambda line: None) -> Path:
    """The batch's contact sheet (PNG in the output folder); each row's ``tile`` is set to its number."""
    from PIL import Image

    cycles = {}
    if plan.thumbnails == "cycles":
        cycles = _cycles_for(rows, store, blender_python, info)
    tiles = []
    for number, row in enumerate(rows, 1):
        row.tile = number
        tile = {"number": number, "label": row.item.relative, "status": row.status, "note": row.reason, "before": None, "after": None}
        if row.status in ("done", "reused") and number in cycles:
            tile["before"], tile["after"] = cycles[number]
        elif row.status in ("done", "reused"):
            paths = thumbnail_paths(store, row.key)
            if not all(p.is_file() for p in paths):
                before, after = _read_or_none(row.item.input), _read_or_none(store.mesh_path(row.key))
                if before is not None and after is not None:
                    store_thumbnails(store, row.key, before, after)
            if all(p.is_file() for p in paths):
                tile["before"], tile["after"] = (np.asarray(Image.open(p).convert("RGB")) for p in paths)
        else:
            before = _read_or_none(row.item.input)
            if before is not None:
                centre, scale = frame([before])
                tile["before"] = render_thumbnail(before, centre, scale)
        tiles.append(tile)
    done = sum(r.status in ("done", "reused") for r in rows)
    title = f"{plan.path.name}: {done} of {len(rows)} done  (left: before, right: after)"
    return compose(tiles, plan.output_folder / "contact_sheet.png", title=title)


def _cycles_for(rows, store, blender_python: Path | None, info) -> dict:
    """Tile number -> (before PNG, after PNG) rendered by Cycles for the done and reused rows."""
    import tempfile

    from ..errors import InvalidInput
    from ..mesh.io import write_mesh

    python = blender_python or Path(__file__).resolve().parents[3] / ".venv-blender" / "bin" / "python"
    if not python.exists():
        raise InvalidInput("[output] thumbnails = \"cycles\" needs Blender's Python module (.venv-blender from "
                           "solver/setup.sh); or use thumbnails = \"raster\"")
    work = Path(tempfile.mkdtemp(prefix="isoclay-cycles-"))
    pairs = []
    for number, row in enumerate(rows, 1):
        if row.status not in ("done", "reused"):
            continue
        before = row.item.input
        if before.suffix.lower() != ".ply":
            mesh = _read_or_none(before)
            if mesh is None:
                continue
            before = work / f"input_{number}.ply"
            write_mesh(before, mesh)
        pairs.append({"name": f"tile_{number}", "before": str(before), "after": str(store.mesh_path(row.key))})
    if not pairs:
        return {}
    rendered = cycles_thumbnails(pairs, work / "renders", python)
    info(f"Cycles thumbnails: {len(pairs)} pairs in {rendered['seconds']:.1f} s")
    return {int(name.split("_")[1]): paths for name, paths in rendered["pictures"].items()}
