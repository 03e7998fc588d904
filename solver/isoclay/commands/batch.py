"""`isoclay batch PLAN.toml`: clean up a scan library on Dask (a LocalCluster by default, or a studio cluster)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

DESCRIPTION = """Run a chain of edits (remesh, smooth, decimate, ...) over every scan a plan names, on Dask.

The plan (TOML) names the inputs, the steps with their parameters in the mesh's units, the output
folder and naming, and per-pattern overrides; see README "Cleaning a scan library" and docs/batch.md.
Results, a JSON report per item, summary.csv and contact_sheet.png go into the output folder.
Finished items are kept by content: a rerun computes only what changed, identical files once.

Without --scheduler a LocalCluster is started on this machine (one worker per free core). With
--scheduler tcp://HOST:PORT (or --scheduler-file F) the batch runs on a cluster started with
`dask scheduler` and `dask worker`; every worker must have isoclay installed and see the plan's
input and output folders under the same paths.
CAUTION: a Dask scheduler runs whatever code its clients send. Keep it on a trusted network (or
loopback), as your studio's network rules require.

Exit codes: 0 all done, 2 a bad plan or some items failed (see summary.csv), 3 cancelled (Ctrl-C).
"""


def add_parser(sub):
    p = sub.add_parser("batch", help="clean up a scan library on Dask (LocalCluster or a studio cluster)",
                       description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("plan", nargs="?", help="the batch plan (TOML)")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="tcp://HOST:PORT", help="run on this Dask scheduler instead of a LocalCluster")
    where.add_argument("--scheduler-file", metavar="F", help="run on the Dask scheduler this file describes (dask scheduler --scheduler-file F)")
    p.add_argument("--dry-run", action="store_true", help="check every input and parameter and print what would run; run nothing")
    p.add_argument("--workers", type=int, default=None, help="LocalCluster workers (default: the plan's, else free cores)")
    p.add_argument("--example", metavar="DIR", help="write an example scan library and plan into DIR and exit")
    p.add_argument("--blender-python", default=None, help="Python with Blender's bpy module, for thumbnails = \"cycles\"")
    p.set_defaults(needs_torch=False)  # the client never runs an edit; workers set torch up themselves
    return p


def run(args, ui) -> int:
    from ..errors import InvalidInput
    from ..batch.plan import PlanError, load_plan

    if args.example:
        from ..batch.example_library import write_example

        plan, paths = write_example(args.example)
        ui.info(f"wrote {len(paths)} scans into {plan.parent / 'scans'} and {plan}; run: isoclay batch {plan}")
        return 0
    if not args.plan:
        raise InvalidInput("give a plan file: isoclay batch PLAN.toml (isoclay batch --example DIR writes one)")
    if args.workers is not None and not 1 <= args.workers <= 256:
        raise InvalidInput(f"--workers {args.workers}: use a whole number from 1 to 256")
    if args.dry_run:
        return _dry_run(args, ui)
    try:
        plan = load_plan(args.plan)
    except PlanError as exc:
        return _refuse(exc.lines)
    problems = _gate(plan)
    if problems:
        return _refuse(problems)
    from ..batch.cluster import connect
    from ..batch.runner import run_batch

    settings = plan.cluster
    ui.info("starting a LocalCluster ..." if not (args.scheduler or args.scheduler_file) else
            f"connecting to {args.scheduler or args.scheduler_file} ...")
    cluster = connect(args.scheduler, args.scheduler_file, args.workers or settings.workers, settings.memory_limit,
                      settings.torch_threads)
    try:
        workers = cluster.workers()
        kind = "LocalCluster" if cluster.local is not None else "cluster"
        ui.info(f"{kind}: {len(workers)} worker(s) ready in {cluster.started_seconds:.1f} s"
                + (f"; dashboard {cluster.dashboard}" if cluster.dashboard else ""))
        result = run_batch(plan, cluster, ui.progress, ui.should_stop, ui.info,
                           Path(args.blender_python) if args.blender_python else None)
    finally:
        cluster.close()
    counts = result.counts
    ui.info(f"{counts['done']} done, {counts['reused']} reused, {counts['failed']} failed"
            + (f", {counts['cancelled']} cancelled" if counts["cancelled"] else "")
            + f" in {result.seconds['total']:.1f} s; summary {result.summary}"
            + (f"; contact sheet {result.contact_sheet}" if result.contact_sheet else ""))
    for row in result.rows:
        if row.status == "failed":
            ui.warn(f"{row.item.relative}: {row.reason}")
    return result.exit_code


def _refuse(lines: list[str]) -> int:
    for line in lines:
        sys.stderr.write(f"isoclay: {line}\n")
    return 2


def _gate(plan) -> list[str]:
    """Check the parameters against the first readable input before starting anything (the rest are
    checked on the workers, each failing alone): a plan wrong for every scan is refused at once."""
    from ..batch.checks import check_item

    for item in plan.items:
        check = check_item(item, None)
        if check.vertices:
            return [line for line in check.problems]
    return []


def _dry_run(args, ui) -> int:
    from ..batch.checks import check_item, merge_problems
    from ..batch.cluster import local_memory_limit, local_workers
    from ..batch.plan import PlanError, load_plan
    from ..batch.runner import key_rows
    from ..batch.store import ResultStore

    try:
        plan, problems = load_plan(args.plan, strict=False)
    except PlanError as exc:
        return _refuse(exc.lines)
    if args.scheduler or args.scheduler_file:
        from ..batch.cluster import connect

        cluster = connect(args.scheduler, args.scheduler_file)
        try:
            limits = [w["memory_limit"] for w in cluster.workers().values() if w["memory_limit"]]
            n, where = len(limits), f"the cluster at {args.scheduler or args.scheduler_file}"
        finally:
            cluster.close()
        limit = min(limits) if limits else None
    else:
        n = local_workers(args.workers or plan.cluster.workers)
        limit = local_memory_limit(n, plan.cluster.memory_limit)
        where = "a LocalCluster"
    store = ResultStore(plan.output_folder)
    rows = key_rows(plan)
    first_of: dict[str, str] = {}
    checks = []
    out = sys.stdout
    for row in rows:
        if not row.key:
            problems.append(row.reason)
            continue
        if row.key in first_of:
            out.write(f"{row.item.relative} -> same content as {first_of[row.key]}: computed once\n")
            continue
        first_of[row.key] = row.item.relative
        check = check_item(row.item, limit)
        checks.append(check)
        state = ("finished earlier: reused" if store.finished(row.key) else
                 f"~{check.memory / 2**30:.1f} GiB" if check.vertices else "cannot be read")
        chain = " > ".join(s.describe() for s in row.item.steps)
        size = f"{check.vertices} vertices" if check.vertices else "unreadable"
        out.write(f"{row.item.relative} ({size}) -> {row.item.output.name}: {chain} [{state}]\n")
    problems += merge_problems(checks)
    memory = f", {limit / 2**30:.1f} GiB each" if limit else ""
    out.write(f"{len(rows)} input(s), {len(first_of)} distinct, into {plan.output_folder}, on {where} "
              f"({n} worker(s){memory}); dry run: nothing was run\n")
    if problems:
        return _refuse(problems)
    return 0
