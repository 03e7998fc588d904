"""`isoclay smooth MESH --strength S --out OUT.ply`: remove bumps smaller than S, keep creases and volume."""

from __future__ import annotations

from ._common import add_edit_options, add_input_output, add_surface_options, check_output_path, fit_config_from, load_input, run_task, write_outputs


def add_parser(sub):
    p = sub.add_parser("smooth", help="remove noise and small bumps while keeping creases sharp",
                       description="Fit a field to the mesh, smooth it with a feature-preserving curvature flow "
                                   "and write the result. Volume is preserved unless --no-preserve-volume.")
    add_input_output(p)
    p.add_argument("--strength", type=float, required=True,
                   help="size of the bumps to remove, in the mesh's units (e.g. 2 for 2 mm bumps on a model in mm)")
    p.add_argument("--no-preserve-volume", dest="preserve_volume", action="store_false",
                   help="let the flow shrink the object as plain curvature flow does")
    p.add_argument("--creases", choices=("auto", "crisp", "soft"), default="auto",
                   help="crease treatment: auto (default: decided from the shape; hard-surface creases come back "
                        "crisp, organic scans stay smooth), crisp (always), soft (never)")
    p.add_argument("--crisp-creases", dest="creases", action="store_const", const="crisp",
                   help="same as --creases crisp (older spelling)")
    add_surface_options(p, "smoothed")
    add_edit_options(p)
    return p


def run(args, ui) -> int:
    out = check_output_path(args.out)
    fit_config_from(args)  # refuse bad fit options before reading the mesh
    params = {"strength": args.strength, "preserve_volume": args.preserve_volume, "creases": args.creases,
              "keep_topology": args.keep_topology, "closed": args.closed}
    if args.resolution is not None:
        params["resolution"] = args.resolution
    prepared = load_input(args.mesh, ui)
    outcome = run_task(args, ui, "smooth", params, prepared)
    write_outputs(outcome, out, args.report, ui, keep_topology=args.keep_topology, prepared=prepared)
    return 0
