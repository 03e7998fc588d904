"""`isoclay deform MESH --handles H.json --out OUT.ply`: move handle points, the rest follows elastically."""

from __future__ import annotations

from ..tasks.stiffness import DEFAULT_STIFFNESS, STIFFNESS
from ..tasks.handles import read_handle_file
from ._common import add_edit_options, add_input_output, check_output_path, fit_config_from, load_input, run_task, write_outputs


def add_parser(sub):
    p = sub.add_parser(
        "deform",
        help="bend, twist and reshape by moving and turning handles; the prop follows as the solid it is",
        description="Fit a field to the mesh, deform its solid interior elastically so every handle lands on its "
        "target, and write the result (a new watertight mesh, or with --keep-topology the input's own vertices "
        "moved). Per-vertex 'stretch' and 'bend' go into PLY output.",
    )
    add_input_output(p)
    p.add_argument("--handles", required=True,
                   help='JSON file in the mesh\'s units: {"handles": [[x,y,z],...], "targets": [[x,y,z],...]} '
                        '(a handle whose target is itself stays put), or {"groups": [{"points": [[x,y,z],...], '
                        '"transform": 4x4}, ...]} (each group moved, turned and scaled by its matrix)')
    p.add_argument("--stiffness", default=DEFAULT_STIFFNESS, choices=tuple(STIFFNESS),
                   help="how firmly the prop keeps its volume where it bends or is squeezed: rubber keeps it and "
                        "bulges, stiff is a plain as-rigid-as-possible solid; for a sheet with no inside, how thick "
                        "it acts (default %(default)s)")
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
    handle_keys = ("groups",) if "groups" in handle_data else ("handles", "targets")
    params = {
        **{k: handle_data.get(k) for k in handle_keys},
        "stiffness": args.stiffness,
        "keep_topology": bool(args.keep_topology),
        "resolution": args.resolution,
        "seed": args.seed,
    }
    prepared = load_input(args.mesh, ui)
    outcome = run_task(args, ui, "deform", params, prepared)
    from ..tasks.deform import summary_line  # the elastic solver loads only when deforming

    line = summary_line(outcome.metrics)
    if line:
        ui.warn(line)
    write_outputs(outcome, out, args.report, ui, keep_topology=args.keep_topology, prepared=prepared)
    return 0
