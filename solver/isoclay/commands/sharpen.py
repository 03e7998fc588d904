"""`isoclay sharpen MESH --amount A --out OUT.ply`: crisp rounded creases toward the edge their sides make."""

from __future__ import annotations

from ._common import add_edit_options, add_input_output, add_surface_options, check_output_path, fit_config_from, load_input, run_task, write_outputs


def add_parser(sub):
    p = sub.add_parser("sharpen", help="crisp softened edges and corners",
                       description="Fit a field to the mesh and move its rounded creases toward the sharp edge "
                                   "their flat sides make; flat faces and gently curved parts stay as they are.")
    add_input_output(p)
    p.add_argument("--amount", type=float, required=True,
                   help="0..1: fraction of the way from the rounded to the fully sharp edge")
    p.add_argument("--radius", type=float, default=None,
                   help="roundness to undo: the radius of the rounded edges, in the mesh's units "
                        "(default: detected from the shape)")
    add_surface_options(p, "sharpened")
    add_edit_options(p)
    return p


def run(args, ui) -> int:
    out = check_output_path(args.out)
    fit_config_from(args)  # refuse bad fit options before reading the mesh
    params = {"amount": args.amount, "keep_topology": args.keep_topology, "closed": args.closed}
    if args.resolution is not None:
        params["resolution"] = args.resolution
    if args.radius is not None:
        params["radius"] = args.radius
    prepared = load_input(args.mesh, ui)
    outcome = run_task(args, ui, "sharpen", params, prepared)
    write_outputs(outcome, out, args.report, ui, keep_topology=args.keep_topology, prepared=prepared)
    return 0
