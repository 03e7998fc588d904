"""One batch item on a worker: read, check memory, run the chain of steps, measure, store atomically.

``process_item(spec)`` is what the client submits to Dask (one task per distinct item key). It
never raises for a problem with the item: it returns a record whose ``status`` is "done",
"failed" (with a one-line ``reason``) or "cancelled", so one broken scan fails alone. Only a
worker that dies takes its item with it; Dask then runs the item again on another worker.

Steps chain through pipeline.run_edit. A field computed by one step (remesh: the input's field,
whose zero level set is the remeshed surface; smooth, sharpen: the edited field; decimate: the
field it was given) is handed to the next step only while it is valid for that step's input:
fields live in the unit box of the mesh they were fitted to, so the next step keeps that
normalisation, and does so only when the new input's own bounding box would give nearly the same
one (centre and longest side within CARRY_CELLS field cells). Otherwise, or when a
step returns no field (deform), the next step fits a new field to its input.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

import numpy as np

from ..callbacks import no_progress
from ..errors import Cancelled, IsoclayError
from ..estimates import estimate_memory
from ..mesh import measures
from ..mesh.normalize import Normalization
from .store import ResultStore

#: A field carries to the next step while that step's input would normalise to within this many
#: field cells of the field's box (centre shift and change of the longest side): differences the
#: field's grid cannot resolve anyway. A remeshed scan's box shrinks by about half a cell (the
#: fitted field rounds the scanner noise's peaks off: measured on the example library, longest
#: side -0.4..-0.5% at fit resolution 128, where a cell is 1.3/128 = 1.0%; -0.8..-1.1% at 64,
#: cell 2.0%); so one cell carries the field past a remesh and refits after a real change.
CARRY_CELLS = 1.0
#: Sampled points per surface for the Chamfer figure: 20k gives the figure to about 2% (measured
#: on the example pebble: 20k vs 200k samples differ by 1.6%) in ~0.1 s on a 40k-face mesh.
CHAMFER_SAMPLES = 20_000
#: Seconds between looks at the batch's stop flag (one round trip to the scheduler each).
STOP_POLL_SECONDS = 0.5
#: Faces of a marching-cubes mesh of a compact object at R cells along its longest side, per R^2
#: (a ball of diameter 1 gives 6.2 R^2 at R = 64..256, measured; flatter or knobbly scans fewer
#: or more): used to estimate the memory of steps that follow a remesh.
FACES_PER_CELL2 = 6.5


def _worker_identity():
    """(address, memory limit in bytes or None, pause fraction) of the Dask worker running us, or of this process."""
    try:
        from distributed import get_worker

        worker = get_worker()
    except (ImportError, ValueError):
        return f"local-{os.getpid()}", None, 0.8
    import dask

    limit = getattr(getattr(worker, "memory_manager", None), "memory_limit", None)
    pause = dask.config.get("distributed.worker.memory.pause", 0.8) or 0.95
    return worker.address, limit, float(pause)


def _stop_flag(name: str | None):
    """should_stop() for the batch's Dask Event ``name`` (checked at most every STOP_POLL_SECONDS)."""
    if not name:
        return lambda: False
    from distributed import Event

    event = Event(name)
    last = [0.0, False]

    def should_stop() -> bool:
        now = time.monotonic()
        if not last[1] and now - last[0] >= STOP_POLL_SECONDS:
            last[0] = now
            try:
                last[1] = bool(event.is_set())
            except Exception:  # the client went away: finish the item, nobody will cancel it
                last[1] = False
        return last[1]

    return should_stop


def memory_needed(steps, fit: dict, n_vertices: int, n_faces: int) -> int:
    """Largest pre-flight estimate (bytes, isoclay.estimates) over the chain. Each step is estimated
    on the size of its input: after a step that remeshes at resolution R, FACES_PER_CELL2 x R^2 faces;
    after a decimate, its budget."""
    import dataclasses

    from ..tasks.registry import task_module

    need = 0
    for step in steps:
        need = max(need, estimate_memory(step.task, n_vertices, n_faces, {**step.params, "fit": fit}))
        if step.task == "decimate":
            n_faces = min(n_faces, int(step.params.get("target_faces", n_faces)))
        elif not step.params.get("keep_topology"):
            defaults = {f.name: f.default for f in dataclasses.fields(task_module(step.task).Config)}
            resolution = step.params.get("resolution", defaults.get("resolution"))
            if isinstance(resolution, int):
                n_faces = int(FACES_PER_CELL2 * resolution**2)
        n_vertices = min(n_vertices, n_faces // 2 + 2) if step.task == "decimate" else n_faces // 2 + 2
    return need


def _gib(n: float) -> str:
    return f"{n / 2**30:.2f} GiB"


def _carried(prepared_next, normalization: Normalization, field, fit_resolution: int):
    """The next step's Prepared in the field's unit box when the field is valid for it, else None."""
    from ..field.grids import DEFAULT_HALF_EXTENT
    from ..pipeline import Prepared

    tolerance = CARRY_CELLS * 2 * DEFAULT_HALF_EXTENT / fit_resolution
    own = prepared_next.normalization
    shift = np.max(np.abs(np.asarray(own.center) - np.asarray(normalization.center))) * normalization.scale
    size = normalization.scale / own.scale  # the new input's longest side in the field's unit box
    if field is None or shift > tolerance or abs(size - 1.0) > tolerance:
        return None
    unit = normalization.mesh_to_unit(prepared_next.check.mesh)
    return Prepared(prepared_next.world, prepared_next.check, normalization, unit, prepared_next.mesh_hash)


def run_chain(mesh_world, steps, fit: dict, should_stop=lambda: False, progress=no_progress):
    """Run the steps in order on a world-units mesh; returns (final mesh, per-step reports, first Prepared)."""
    from ..field.fit import FitConfig
    from ..pipeline import prepare_mesh, run_edit

    fit_config = FitConfig(**fit).validated()
    prepared = first = prepare_mesh(mesh_world, "input")
    field = normalization = None
    reports = []
    current = mesh_world
    for i, step in enumerate(steps):
        if i > 0:
            prepared = prepare_mesh(current, f"step {i} result")
            carried = _carried(prepared, normalization, field, fit_config.resolution) if field is not None else None
            if carried is None:
                field = None
            else:
                prepared = carried
        outcome = run_edit(prepared.world, step.task, step.params, field=field, fit_config=fit_config,
                           progress=progress, should_stop=should_stop, prepared=prepared, correspondence=False)
        report = dict(outcome.report)
        report["field"] = "carried" if field is not None else "fitted"
        report["result_volume"] = measures.signed_volume(outcome.mesh.vertices, outcome.mesh.faces)
        reports.append(report)
        current = outcome.mesh
        field, normalization = outcome.result_field, prepared.normalization
    return current, reports, first


def _volume_change(final, first, reports) -> tuple[float, str]:
    """Final volume against the input's when the input is closed, else against the first closed step result."""
    final_volume = measures.signed_volume(final.vertices, final.faces)
    clean = first.check.mesh
    if measures.is_watertight(clean.faces):
        return final_volume / abs(measures.signed_volume(clean.vertices, clean.faces)) - 1.0, "input"
    for i, report in enumerate(reports, 1):
        if report.get("watertight"):
            return final_volume / abs(report["result_volume"]) - 1.0, f"step {i} result (the input is open)"
    return float("nan"), "none (the input is open and no step closed it)"


def process_item(spec: dict) -> dict:
    """Run one item (see the module docstring). spec: key, input, relative, steps [(task, params)],
    fit, output_folder, stop_event (Dask Event name or None)."""
    from ..mesh.compare import surface_distance
    from ..mesh.io import read_mesh
    from .plan import Step

    t0 = time.perf_counter()
    worker, memory_limit, pause = _worker_identity()
    key = spec["key"]
    store = ResultStore(Path(spec["output_folder"]))
    base = {"key": key, "input": spec["input"], "relative": spec["relative"], "worker": worker, "pid": os.getpid()}
    earlier = store.finished(key)
    if earlier is not None:  # a previous attempt finished it (its worker died before reporting)
        return {**base, "status": "done", "reason": "", "seconds": 0.0, "record": earlier}
    steps = [Step(task, params) for task, params in spec["steps"]]
    should_stop = _stop_flag(spec.get("stop_event"))
    try:
        mesh = read_mesh(spec["input"])
        need = memory_needed(steps, spec["fit"], mesh.n_vertices, mesh.n_faces)
        if memory_limit and need > pause * memory_limit:
            raise IsoclayError(
                f"needs about {_gib(need)} but the worker has {_gib(memory_limit)} (work pauses above {pause:.0%}): "
                "decimate the scan first, lower the resolutions, or give the workers more memory"
            )
        final, reports, first = run_chain(mesh, steps, spec["fit"], should_stop)
        t1 = time.perf_counter()
        reference = first.check.mesh
        distance = surface_distance(final, reference, CHAMFER_SAMPLES)
        volume_change, volume_reference = _volume_change(final, first, reports)
        quality = {
            "watertight": measures.is_watertight(final.faces),
            "chamfer_rel": distance.chamfer_rel,
            "hausdorff_rel": distance.hausdorff_rel,
            "volume_change": volume_change,
            "volume_reference": volume_reference,
            "vertices": final.n_vertices,
            "faces": final.n_faces,
            "input_vertices": mesh.n_vertices,
            "input_faces": mesh.n_faces,
            "bbox_diagonal": measures.bbox_diagonal(reference.vertices),
        }
        seconds = {"steps": [r["seconds"].get("total", 0.0) for r in reports], "quality": time.perf_counter() - t1}
        if spec.get("thumbnails"):
            from .contact_sheet import store_thumbnails

            t2 = time.perf_counter()
            store_thumbnails(store, key, mesh, final)
            seconds["thumbnails"] = time.perf_counter() - t2
        # the item's time includes writing its result (as a command's run includes writing its output)
        seconds["total"] = time.perf_counter() - t0
        record = {**base, "status": "done", "seconds": seconds, "quality": quality, "memory_estimate": need,
                  "memory_limit": memory_limit, "warnings": list(first.check.warnings),
                  "steps": reports, "finished": time.time()}
        t3 = time.perf_counter()
        record = store.save(key, final, record)
        seconds["total"] += time.perf_counter() - t3
        return {**base, "status": "done", "reason": "", "seconds": seconds["total"], "record": record}
    except Cancelled as exc:
        return {**base, "status": "cancelled", "reason": str(exc), "seconds": time.perf_counter() - t0}
    except IsoclayError as exc:
        return {**base, "status": "failed", "reason": str(exc), "seconds": time.perf_counter() - t0}
    except MemoryError:
        return {**base, "status": "failed", "reason": "ran out of memory: decimate the scan first or lower the resolutions",
                "seconds": time.perf_counter() - t0}
    except Exception as exc:  # an internal error fails this item only; the batch goes on
        return {**base, "status": "failed", "reason": f"internal error ({type(exc).__name__}: {exc})",
                "seconds": time.perf_counter() - t0}
