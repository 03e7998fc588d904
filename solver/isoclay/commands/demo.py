"""`isoclay demo`: the built-in workshop edits end to end, with a table, a .blend and pictures."""

from __future__ import annotations

import dataclasses
import json
import os
import subprocess
import sys
import time
from pathlib import Path

from ..errors import InvalidInput
from ..field.fit import FitConfig
from ..mesh.io import read_mesh, write_mesh
from ..pipeline import prepare_mesh, run_edit
from ..tasks.registry import TASK_MODULES, task_module
from ._common import write_report

#: The repository's demo folder (scene generator, props, handle files, render scripts).
DEMO_DIR = Path(__file__).resolve().parents[3] / "demo_blends"
#: Smaller settings for --quick (tests): coarser field and extraction.
QUICK_FIT = FitConfig(resolution=64)
QUICK_PARAMS = {"resolution": 96}


def add_parser(sub):
    p = sub.add_parser("demo", help="run the workshop demo edits (deform, smooth, sharpen) and render pictures",
                       description="Run the built-in workshop edits: bend the hook, tilt the lantern, smooth the stone, "
                                   "sharpen the anvil. Writes result PLYs, a .blend with originals and results side by "
                                   "side, before/after pictures and a summary table.")
    p.add_argument("--out", default="demo_out", help="output folder (default demo_out)")
    p.add_argument("--quick", action="store_true", help="coarser settings for a fast check")
    p.add_argument("--scene", default=str(DEMO_DIR), help="folder with the demo props (default: the repository's demo_blends)")
    p.add_argument("--no-render", action="store_true", help="skip the pictures and the .blend (no Blender needed)")
    p.add_argument("--blender-python", default=os.environ.get("ISOCLAY_BLENDER_PYTHON"),
                   help="Python with the bpy module (default: .venv-blender beside the repository)")
    return p


def _task_params(task: str, edit: dict, scene: Path, quick: bool) -> dict:
    if task == "deform":
        path = scene / edit["handles"]
        try:
            params = json.loads(path.read_text())
        except (OSError, ValueError) as exc:
            raise InvalidInput(f"{path}: cannot read the handle file ({exc})") from None
    elif task == "smooth":
        params = {"strength": edit["strength"]}
    elif task == "sharpen":
        params = {"amount": edit["amount"]}
    else:
        params = {}
    if quick:
        fields = {f.name for f in dataclasses.fields(task_module(task).Config)}
        params.update({k: v for k, v in QUICK_PARAMS.items() if k in fields and k not in params})
    return params


def _summary(report: dict) -> str:
    # field_volume_change compares the enclosed volumes of the fields before and after, which
    # stays meaningful for open scans (the stone); volume_change compares with the input mesh
    keys = ("handle_error_max_rel", "field_volume_change", "volume_change_rel", "stretch_mean", "bend_mean")
    parts = []
    for k in keys:
        if k in report:
            v = report[k]
            parts.append(f"{k}={v:.2%}" if k.endswith(("_rel", "_change")) else f"{k}={v:.3g}")
    return ", ".join(parts[:3])


def run(args, ui) -> int:
    scene = Path(args.scene)
    edits_file = scene / "demo_edits.json"
    if not edits_file.is_file():
        raise InvalidInput(f"{edits_file}: no demo edit list; run demo_blends/make_workshop.py or pass --scene")
    edits = json.loads(edits_file.read_text())
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    fit_config = QUICK_FIT if args.quick else FitConfig()
    rows, results, pairs = [], [], []
    t_all = time.perf_counter()
    for edit in edits:
        prop, task = edit["prop"], edit["task"]
        if task not in TASK_MODULES:
            ui.warn(f"{prop}: task {task!r} is not available in this installation; skipped")
            continue
        ui.info(f"== {prop}: {task} ({edit.get('what', '')})")
        prepared = prepare_mesh(read_mesh(scene / edit["mesh"]), edit["mesh"])
        params = _task_params(task, edit, scene, args.quick)
        outcome = run_edit(prepared.world, task, params, fit_config=fit_config, progress=ui.progress,
                           should_stop=ui.should_stop, prepared=prepared, correspondence=False)
        result_path = out / f"{prop}_result.ply"
        write_mesh(result_path, outcome.mesh)
        write_report(str(out / f"{prop}_report.json"), outcome.report)
        rows.append((prop, task, outcome.seconds["total"], prepared.world.n_vertices, outcome.mesh.n_vertices, _summary(outcome.report)))
        results.append({"prop": prop, "result": result_path.name})
        pairs.append({"name": prop, "before": str((scene / edit["mesh"]).resolve()), "after": result_path.name})
    (out / "results.json").write_text(json.dumps(results, indent=1))
    _print_table(rows, ui)
    if not args.no_render and results:
        _render(args, ui, scene, out, results, pairs)
    ui.info(f"demo finished in {time.perf_counter() - t_all:.0f} s; outputs in {out}")
    return 0


def _print_table(rows, ui) -> None:
    lines = [f"{'prop':<8} {'task':<8} {'seconds':>8} {'in verts':>9} {'out verts':>9}  quality"]
    for prop, task, seconds, n_in, n_out, quality in rows:
        lines.append(f"{prop:<8} {task:<8} {seconds:>8.1f} {n_in:>9} {n_out:>9}  {quality}")
    sys.stdout.write("\n".join(lines) + "\n")


def _blender_python(args) -> Path | None:
    if args.blender_python:
        return Path(args.blender_python)
    candidate = DEMO_DIR.parent / ".venv-blender" / "bin" / "python"
    return candidate if candidate.exists() else None


def _render(args, ui, scene: Path, out: Path, results, pairs) -> None:
    python = _blender_python(args)
    if python is None or not python.exists():
        raise InvalidInput("no Python with Blender's bpy module found for the pictures: run solver/setup.sh, "
                           "pass --blender-python, or use --no-render")
    (out / "pairs.json").write_text(json.dumps(pairs, indent=1))
    ui.info("placing results beside the originals in a copy of the workshop scene ...")
    _blender(python, [str(DEMO_DIR / "place_results.py"), "--scene", str(scene / "workshop.blend"),
                      "--results", str(out / "results.json"), "--out", str(out / "workshop_results.blend")])
    ui.info("rendering before/after pictures with Cycles on the CPU ...")
    size = "240x180" if args.quick else "480x360"
    samples = "4" if args.quick else "16"
    listing = _blender(python, [str(DEMO_DIR / "render_views.py"), "--pairs", str(out / "pairs.json"),
                                "--out", str(out / "renders"), "--size", size, "--samples", samples])
    # picture paths and cameras, so anyone can project geometry onto the pictures exactly
    (out / "renders" / "renders.json").write_text(listing)


def _blender(python: Path, argv: list[str]) -> str:
    done = subprocess.run([str(python), *argv], capture_output=True, text=True)
    if done.returncode != 0:
        lines = [line for line in done.stderr.strip().splitlines() if line.strip()]
        raise InvalidInput(f"{Path(argv[0]).name} failed: {lines[-1] if lines else 'no message'}")
    return done.stdout
