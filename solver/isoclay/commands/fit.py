"""`isoclay fit MESH --out FIELD.pt`: fit and save a field."""

from __future__ import annotations

from pathlib import Path

from ..errors import InvalidInput
from ..field.fit import fit_field
from ..pipeline import fit_key
from ._common import add_fit_options, fit_config_from, load_input, write_report


def add_parser(sub):
    p = sub.add_parser("fit", help="fit a signed-distance field to a mesh and save it",
                       description="Fit a signed-distance field to a mesh and save it as a checkpoint (.pt).")
    p.add_argument("mesh", help="input mesh: PLY, OBJ, STL or glTF")
    p.add_argument("--out", required=True, help="checkpoint file to write (.pt)")
    p.add_argument("--report", help="write a JSON report")
    add_fit_options(p)
    return p


def run(args, ui) -> int:
    from ..field.checkpoint import save_field  # torch: loaded only when a checkpoint is written

    out = Path(args.out)
    if out.suffix != ".pt":
        raise InvalidInput(f"{out.name}: field checkpoints end in .pt")
    if not out.parent.exists():
        raise InvalidInput(f"{out.parent}: output folder does not exist")
    config = fit_config_from(args)
    prepared = load_input(args.mesh, ui)
    fitted = fit_field(prepared.unit, config, ui.progress, ui.should_stop)
    n = prepared.normalization
    extra = {"center": list(n.center), "scale": n.scale, "mesh_hash": prepared.mesh_hash,
             "fit_key": fit_key(prepared.mesh_hash, config), "fit": config.to_dict()}
    save_field(out, fitted.field, extra)
    ui.info(f"wrote {out} (fit in {fitted.seconds['total']:.1f} s)")
    if args.report:
        write_report(args.report, {"task": "fit", "seconds": fitted.seconds, **extra, **fitted.metrics})
    return 0
