"""Helpers the edit subcommands share: read input, fit options, write outputs and reports."""

from __future__ import annotations

import json
import os
from pathlib import Path

from ..errors import InvalidInput
from ..field.fit import FitConfig
from ..mesh.io import FORMATS, read_mesh, write_mesh
from ..mesh.types import TriangleMesh
from ..pipeline import Prepared, prepare_mesh, run_edit
from ..service.remote import add_remote_options, connection_from, remote_requested, run_remote_edit


def add_input_output(parser, out_help: str = "result mesh (.ply, .obj, .stl, .glb, .gltf)") -> None:
    parser.add_argument("mesh", help="input mesh: PLY, OBJ, STL or glTF")
    parser.add_argument("--out", required=True, help=out_help)
    parser.add_argument("--report", help="write a JSON report (timings, sizes, quality figures)")


def add_surface_options(parser, what: str) -> None:
    """--keep-topology, --resolution and --closed, shared by the field edits that output a surface."""
    parser.add_argument("--keep-topology", action="store_true",
                        help=f"move the input's own vertices onto the {what} surface (keeps UVs); "
                             "per-vertex 'moved' distance goes into the PLY")
    parser.add_argument("--resolution", type=int, default=None,
                        help="marching-cubes cells along the longest side (default: follows the input's edge "
                             "lengths, then decimated toward its face count)")
    parser.add_argument("--closed", action="store_true",
                        help="return a closed surface even for an open scan (default: open where the scan was open)")


def add_fit_options(parser) -> None:
    group = parser.add_argument_group("field fit")
    group.add_argument("--field-resolution", type=int, default=FitConfig.resolution,
                       help=f"grid cells per axis of the fitted field (default {FitConfig.resolution}); "
                            "details smaller than about 1/%(default)s of the object get rounded")
    group.add_argument("--fit-steps", type=int, default=FitConfig.steps,
                       help="extra Adam refinement steps with an eikonal term (default %(default)s)")
    group.add_argument("--architecture", choices=("spline", "mlp"), default=FitConfig.architecture,
                       help="field model: spline grid (fast, default) or positional-encoding MLP (reference)")
    group.add_argument("--seed", type=int, default=0, help="random seed (default 0)")


def add_edit_options(parser) -> None:
    """Fit options plus the optional solver service to run the edit on."""
    add_fit_options(parser)
    add_remote_options(parser)


def run_task(args, ui, task: str, params: dict, prepared: Prepared):
    """Run an edit in this process, or on a running solver when --connection-file/--endpoint is given.

    Returns an object with ``mesh`` (world units) and ``report`` (JSON-ready, with seconds.total).
    """
    config = fit_config_from(args)
    if remote_requested(args):
        outcome = run_remote_edit(connection_from(args), prepared.world, task, params,
                                  source_key=args.source_key or Path(args.mesh).name, fit=config.to_dict(),
                                  progress=ui.progress, should_stop=ui.should_stop)
        for line in outcome.warnings:
            ui.warn(line)
        mesh = outcome.mesh
        # the service returns plain arrays; keep the input's UVs/materials for keep-topology writes
        return type(outcome)(TriangleMesh(mesh.vertices, mesh.faces, mesh.vertex_values, prepared.world.source),
                             outcome.report, outcome.metrics, outcome.node_id, outcome.job_id, outcome.warnings)
    outcome = run_edit(prepared.world, task, params, fit_config=config, progress=ui.progress,
                       should_stop=ui.should_stop, prepared=prepared, correspondence=False)
    for line in outcome.warnings[len(prepared.check.warnings):]:  # what the fit found (thin parts)
        ui.warn(line)
    return outcome


def fit_config_from(args) -> FitConfig:
    return FitConfig(architecture=args.architecture, resolution=args.field_resolution, steps=args.fit_steps, seed=args.seed).validated()


def check_output_path(path: str) -> Path:
    """Refuse an output path we cannot write before spending minutes on the work."""
    out = Path(path)
    if out.suffix.lower() not in FORMATS:
        raise InvalidInput(f"{out.name}: unsupported output type {out.suffix or '(none)'}; use one of {', '.join(FORMATS)}")
    if not out.parent.exists():
        raise InvalidInput(f"{out.parent}: output folder does not exist")
    if out.is_dir():
        raise InvalidInput(f"{out}: is a folder, give a file name")
    if not os.access(out.parent, os.W_OK):
        raise InvalidInput(f"{out.parent}: output folder is not writable")
    return out


def load_input(path: str, ui) -> Prepared:
    """Read and validate the input mesh; warnings go to the user."""
    mesh = read_mesh(path)
    prepared = prepare_mesh(mesh, Path(path).name)
    for line in prepared.check.warnings:
        ui.warn(f"{Path(path).name}: {line}")
    return prepared


def write_outputs(outcome, out: Path, report_path: str | None, ui, keep_topology: bool = False,
                  prepared: Prepared | None = None) -> None:
    """Write the result mesh (UVs/materials kept when the topology is the input's) and the report.

    keep_topology with the input ``prepared``: the input's own faces are written, as given (not the
    validated copy, which drops degenerate faces and turns inward-facing parts round), also for
    a plain PLY that was read without a trimesh source object."""
    mesh = outcome.mesh
    given = prepared.world if prepared is not None else None
    if keep_topology and given is not None and given.source is None and mesh.n_vertices == given.n_vertices:
        mesh = TriangleMesh(mesh.vertices, given.faces, mesh.vertex_values, None)
    write_mesh(out, mesh, keep_source=keep_topology)
    seconds = outcome.report.get("seconds", {}).get("total", float("nan"))
    ui.info(f"wrote {out} ({outcome.mesh.n_vertices} vertices, {outcome.mesh.n_faces} faces) in {seconds:.1f} s")
    if report_path:
        write_report(report_path, outcome.report)


def write_report(path: str, report: dict) -> None:
    target = Path(path)
    if not target.parent.exists():
        raise InvalidInput(f"{target.parent}: report folder does not exist")
    tmp = target.with_name(f".{target.name}.partial")
    tmp.write_text(json.dumps(report, indent=2, sort_keys=True, allow_nan=True))
    os.replace(tmp, target)
