"""Run a plan on a Dask cluster: key every item, skip what is finished, submit the rest, publish as they land.

run_batch(plan, cluster, progress, should_stop) -> BatchResult. One Dask task per distinct item key
(process_item, named "isoclay-item-<key>"), so byte-identical inputs are computed once; the
scheduler runs a dead worker's tasks again on the others. Results are published under their output
names as each one arrives, so a cancelled or interrupted batch keeps everything that finished;
summary.csv, the item reports and the contact sheet are written at the end (also after a cancel).
Nothing here knows about terminals: progress goes to ``progress("batch", fraction, counts)``.
"""

from __future__ import annotations

import time
import uuid
from dataclasses import dataclass
from pathlib import Path

from ..callbacks import never_stop, no_progress
from .plan import Plan
from .store import ResultStore, file_hash, item_key
from .summary import Row, write_batch_record, write_item_report, write_summary

#: Seconds between looks at finished tasks, the stop request and the running count.
POLL_SECONDS = 0.25


@dataclass(frozen=True)
class BatchResult:
    """rows : one per input, in plan order; summary : summary.csv; contact_sheet : PNG or None;
    counts : status -> number; seconds : wall time per phase; exit_code : 0 all done, 2 some failed, 3 cancelled."""

    rows: tuple[Row, ...]
    summary: Path
    contact_sheet: Path | None
    counts: dict
    seconds: dict
    exit_code: int


def key_rows(plan: Plan) -> list[Row]:
    """A Row per item with its key (input content hash + steps + fit); unreadable inputs fail here."""
    rows = []
    for item in plan.items:
        try:
            key = item_key(file_hash(item.input), item.steps, item.fit)
            rows.append(Row(item, key))
        except OSError as exc:
            rows.append(Row(item, "", status="failed", reason=f"{item.relative}: cannot be read ({exc.strerror})"))
    return rows


def spec_of(row: Row, plan: Plan, stop_event: str | None) -> dict:
    return {"key": row.key, "input": str(row.item.input), "relative": row.item.relative,
            "steps": [(s.task, s.params) for s in row.item.steps], "fit": row.item.fit,
            "output_folder": str(plan.output_folder), "stop_event": stop_event, "thumbnails": plan.contact_sheet and plan.thumbnails == "raster"}


def _counts(rows, running: int) -> dict:
    counts = {s: 0 for s in ("done", "reused", "failed", "cancelled")}
    for row in rows:
        if row.status in counts:
            counts[row.status] += 1
    counts["running"] = running
    return counts


def _finish_rows(rows_of_key: list[Row], outcome: dict, store: ResultStore, status: str) -> None:
    """Fill the rows of one key from its task's outcome and publish their outputs."""
    first = rows_of_key[0]
    for row in rows_of_key:
        row.worker = outcome.get("worker", "")
        row.record = outcome.get("record") or {}
        row.reason = outcome.get("reason", "")
        row.status = outcome["status"] if outcome["status"] != "done" else status
        row.seconds = float(outcome.get("seconds", 0.0)) if row is first else 0.0
        if row.status in ("done", "reused"):
            if row is not first:
                row.status, row.same_as = "reused", first.item.relative
            try:
                store.publish(row.key, row.item.output)
            except OSError as exc:
                row.status, row.reason = "failed", f"cannot write {row.item.output} ({exc.strerror})"


def run_batch(plan: Plan, cluster, progress=no_progress, should_stop=never_stop, info=lambda line: None,
              blender_python: Path | None = None) -> BatchResult:
    """Run every item of ``plan`` on ``cluster`` (batch.cluster.Cluster); see the module docstring."""
    from distributed import Event

    t0 = time.perf_counter()
    plan.output_folder.mkdir(parents=True, exist_ok=True)
    store = ResultStore(plan.output_folder).create()
    rows = key_rows(plan)
    by_key: dict[str, list[Row]] = {}
    for row in rows:
        if row.key:
            by_key.setdefault(row.key, []).append(row)
    to_run = []
    for key, group in by_key.items():
        record = store.finished(key)
        if record is not None:
            _finish_rows(group, {"status": "done", "worker": record.get("worker", ""), "record": record, "seconds": 0.0},
                         store, "reused")
            group[0].seconds = 0.0
        else:
            to_run.append(key)
    seconds = {"prepare": time.perf_counter() - t0}
    info(f"{len(rows)} inputs: {len(by_key) - len(to_run)} finished earlier, {len(to_run)} to compute"
         + (f", {len(rows) - len(by_key) - sum(1 for r in rows if not r.key)} duplicate(s)" if len(by_key) < len(rows) else ""))

    client = cluster.client
    stop_name = f"isoclay-batch-stop-{uuid.uuid4().hex}"
    stop = Event(stop_name, client=client)
    futures = {}
    # biggest inputs first: the longest items start early and the workers finish together
    for key in sorted(to_run, key=lambda k: -by_key[k][0].item.input.stat().st_size):
        spec = spec_of(by_key[key][0], plan, stop_name)
        futures[client.submit(_process, spec, key=f"isoclay-item-{key}", pure=False,
                              priority=by_key[key][0].item.input.stat().st_size)] = key
    pending = set(futures)
    cancelled = False
    t1 = time.perf_counter()
    last_running = (0.0, 0)
    threads = sum(w["nthreads"] for w in cluster.workers().values()) or 1  # tasks queued on a worker are not running yet
    total = len(rows)
    while pending:
        if should_stop() and not cancelled:
            cancelled = True
            stop.set()
            info("cancelling: finished items stay; running ones stop at their next check")
            client.cancel(list(pending))
            for future in pending:
                key = futures[future]
                record = store.finished(key)
                if record is not None:  # stored by its worker, not yet reported: it finished, publish it
                    _finish_rows(by_key[key], {"status": "done", "worker": record.get("worker", ""), "record": record,
                                               "seconds": record.get("seconds", {}).get("total", 0.0)}, store, "done")
                    continue
                for row in by_key[key]:
                    row.status, row.reason = "cancelled", "the batch was cancelled before this item finished"
            break
        # futures' states are kept current by the client's own thread: looking costs no round trip
        # (distributed.wait would need a default client, which a caller's thread may not have)
        done = {f for f in pending if f.done()}
        pending -= done
        if not done:
            time.sleep(POLL_SECONDS)
        for future in done:
            key = futures[future]
            try:
                outcome = future.result()
            except Exception as exc:  # KilledWorker after repeated deaths, a worker lost for good...
                outcome = {"status": "failed", "reason": _task_failure(exc), "worker": ""}
            _finish_rows(by_key[key], outcome, store, "done")
        now = time.monotonic()
        if now - last_running[0] > 1.0:
            try:
                running = len({k for keys in client.processing().values() for k in keys})
            except Exception:
                running = last_running[1]
            last_running = (now, running)
        counts = _counts(rows, min(last_running[1], len(pending), threads))
        finished = total - sum(1 for r in rows if r.status == "pending")
        progress("batch", finished / max(total, 1), counts)
    seconds["compute"] = time.perf_counter() - t1
    for row in rows:
        if row.status == "pending":
            row.status, row.reason = "cancelled", "the batch was cancelled before this item finished"
    try:
        stop.set()  # any straggler on a worker gives up
    except Exception:
        pass

    t2 = time.perf_counter()
    sheet = None
    if plan.contact_sheet and any(r.status in ("done", "reused", "failed") for r in rows):
        from .contact_sheet import write_contact_sheet

        sheet = write_contact_sheet(rows, plan, store, blender_python, info)
    seconds["contact_sheet"] = time.perf_counter() - t2
    for row in rows:
        write_item_report(row, plan.output_folder)
    sheet_name = sheet.name if sheet else ""
    summary = write_summary(rows, plan.output_folder, sheet_name)
    counts = _counts(rows, 0)
    del counts["running"]
    seconds["total"] = time.perf_counter() - t0
    exit_code = 3 if cancelled else 2 if counts["failed"] else 0
    write_batch_record(plan.output_folder, {
        "plan": str(plan.path), "summary": summary.name, "contact_sheet": sheet_name or None, "counts": counts,
        "seconds": seconds, "workers": sorted({r.worker for r in rows if r.worker}), "exit_code": exit_code,
        "finished": time.time(),
    })
    progress("batch", 1.0, _counts(rows, 0))
    return BatchResult(tuple(rows), summary, sheet, counts, seconds, exit_code)


def _process(spec: dict) -> dict:
    from .work import process_item

    return process_item(spec)


def _task_failure(exc: Exception) -> str:
    name = type(exc).__name__
    if name == "KilledWorker":
        return ("the worker running this item died several times (likely out of memory): decimate the scan first, "
                "lower the resolutions or give the workers more memory")
    if name == "CancelledError":
        return "the batch was cancelled before this item finished"
    return f"the cluster lost this item ({name}: {exc})"
