"""`isoclay deform MESH --handles H.json --out OUT.ply`: move handle points, the rest follows elastically."""

from __future__ import annotations

from ..tasks.deform import DEFAULT_STIFFNESS, STIFFNESS
from ..tasks.handles import read_handle_file
from ._common import add_edit_options, add_input_output, check_output_path, fit_config_from, load_input, run_task, write_outputs


def add_parser(sub):
    names = ", ".join(f"{k} ({v:g})" for k, v in STIFFNESS.items())
    p = sub.add_parser(
        "deform",
        help="bend and reshape by moving handle points; the rest follows like an elastic shell",
        description="Fit a field to the mesh, warp space so every handle lands on its target while the surface "
        "stretches and bends as little as possible, and write the result (a new watertight mesh, or with "
        "--keep-topology the input's own vertices moved). Per-vertex 'stretch' and 'bend' go into PLY output.",
    )
    add_input_output(p)
    p.add_argument("--handles", required=True,
                   help='JSON file {"handles": [[x,y,z],...], "targets": [[x,y,z],...]} in the mesh\'s units; '
                        "a handle whose target is itself stays put")
    p.add_argument("--stiffness", default=DEFAULT_STIFFNESS,
                   help=f"how the material resists bending: {names}, or a shell thickness as a fraction "
                        "of the object's longest side (default %(default)s)")
    p.add_argument("--keep-topology", action="store_true",
                   help="move the input's own vertices (keeps faces, UVs and materials) instead of remeshing")
    p.add_argument("--resolution", type=int, default=160,
                   help="marching-cubes cells along the longest side when remeshing (default %(default)s)")
    add_edit_options(p)
    return p


def run(args, ui) -> int:
    out = check_output_path(args.out)
    fit_config_from(args)  # refuse bad fit options before reading the mesh
    handle_data = read_handle_file(args.handles)
    params = {
        "handles": handle_data.get("handles"),
        "targets": handle_data.get("targets"),
        "stiffness": args.stiffness,
        "keep_topology": bool(args.keep_topology),
        "resolution": args.resolution,
        "seed": args.seed,
    }
    prepared = load_input(args.mesh, ui)
    outcome = run_task(args, ui, "deform", params, prepared)
    metrics = outcome.metrics
    if not metrics.get("converged", 1.0):
        ui.warn(
            f"the deformation stopped after {int(metrics.get('steps', 0))} steps before settling; "
            f"handle error {metrics.get('handle_error_max_rel', float('nan')):.2%} of the diagonal"
        )
    write_outputs(outcome, out, args.report, ui, keep_topology=args.keep_topology)
    return 0
