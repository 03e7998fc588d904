"""`isoclay bench [--quick]`: print JSON timings and quality figures with same-run references."""

from __future__ import annotations

import importlib
import json
import sys
import time

#: Benchmark sections: module under isoclay.bench with run(quick) -> dict. Sections whose
#: module is not part of this installation are listed as missing, not silently dropped.
SECTIONS = ("core", "deform", "smooth", "service", "batch", "remesh")


def add_parser(sub):
    p = sub.add_parser("bench", help="measure speed and quality against references (prints JSON)",
                       description="Run the benchmarks and print JSON. Ratios compare with references run in the same process.")
    p.add_argument("--quick", action="store_true", help="smaller sizes and budgets (a few minutes)")
    p.add_argument("--only", choices=SECTIONS, action="append", help="run only these sections (repeatable)")
    p.add_argument("--out", help="also write the JSON to this file")
    return p


def run(args, ui) -> int:
    result = {"quick": bool(args.quick), "sections": {}}
    for name in args.only or SECTIONS:
        try:
            module = importlib.import_module(f"isoclay.bench.{name}")
        except ModuleNotFoundError:
            result["sections"][name] = {"missing": True}
            continue
        ui.info(f"bench: {name} ...")
        t0 = time.perf_counter()
        result["sections"][name] = module.run(args.quick)
        result["sections"][name]["wall_seconds"] = time.perf_counter() - t0
    text = json.dumps(result, indent=2, default=float)
    sys.stdout.write(text + "\n")
    if args.out:
        with open(args.out, "w") as fh:
            fh.write(text + "\n")
    return 0
