"""`isoclay remesh MESH --out OUT.ply`: fit a field and extract a clean watertight mesh."""

from __future__ import annotations

from ..extract.hole_fill import FILL_MODES
from ..field.fit import needs_torch
from ..pipeline import run_edit
from ..runtime import configure_threads, configure_torch
from ._common import add_fit_options, add_input_output, check_output_path, fit_config_from, load_input, write_outputs


def add_parser(sub):
    p = sub.add_parser("remesh", help="turn a broken scan into a clean watertight mesh",
                       description="Fit a field to the mesh and extract its surface as a closed, consistently oriented mesh.")
    add_input_output(p)
    p.add_argument("--resolution", type=int, default=None,
                   help="marching-cubes cells along the longest side (default 256, finer where the field holds thinner parts)")
    p.add_argument("--target-faces", type=int, default=0, help="decimate to at most this many faces (default: keep all)")
    p.add_argument("--hole-fill", default="auto", choices=FILL_MODES,
                   help="how an open scan's holes are closed: smooth continues the surface around the hole, flat puts "
                        "a lid on it; auto (default) continues holes up to a quarter of the longest side and lids "
                        "wider openings (the mouth of a cup)")
    add_fit_options(p)
    p.set_defaults(needs_torch=False)  # a spline fit and extraction need no torch; run() sets it up if the fit does
    return p


def run(args, ui) -> int:
    out = check_output_path(args.out)
    config = fit_config_from(args)
    if needs_torch(config):
        configure_torch(args.threads)
    else:
        configure_threads(args.threads)
    prepared = load_input(args.mesh, ui)
    outcome = run_edit(prepared.world, "remesh", {"resolution": args.resolution, "target_faces": args.target_faces,
                                                         "hole_fill": args.hole_fill},
                       fit_config=config, progress=ui.progress, should_stop=ui.should_stop, prepared=prepared,
                       correspondence=False, plain_field=True)
    for line in outcome.warnings[len(prepared.check.warnings):]:
        ui.warn(line)
    write_outputs(outcome, out, args.report, ui)
    return 0
