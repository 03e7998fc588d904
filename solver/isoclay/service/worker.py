"""The job worker: one spawned process per job, with memory and CPU limits, talking to the server over a pipe.

Messages to the server: ("started", pid) first, ("progress", stage, fraction, info) at most
10 per second, then exactly one of ("done", record), ("cancelled", message), ("failed", code,
message). The server sends
("cancel",) to ask for a cooperative stop; it terminates the process if that takes too long.
Torch is imported here (for fitting tasks), never in the server process.
"""

from __future__ import annotations

import faulthandler
import math
import os
import sys
import time

PROGRESS_INTERVAL_S = 0.1


def set_limits(memory_bytes: int | None, cpu_seconds: float | None) -> None:
    """Address-space and CPU-time limits for this process (Linux/macOS; no-op elsewhere)."""
    try:
        import resource
    except ImportError:  # pragma: no cover - Windows
        return
    try:
        if memory_bytes:
            resource.setrlimit(resource.RLIMIT_AS, (int(memory_bytes), int(memory_bytes)))
        if cpu_seconds:
            soft = int(math.ceil(cpu_seconds))
            resource.setrlimit(resource.RLIMIT_CPU, (soft, soft + 5))
    except (ValueError, OSError):  # e.g. macOS refuses RLIMIT_AS; the wall-clock limit still holds
        pass


def die_with_parent() -> None:
    """Ask Linux to SIGKILL this worker when the server dies (kill -9 included)."""
    try:
        import ctypes
        import signal

        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        libc.prctl(1, int(signal.SIGKILL), 0, 0, 0)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):  # pragma: no cover - not Linux
        pass


class _Channel:
    """Progress throttling and cancel checks over the pipe to the server."""

    def __init__(self, conn, parent_pid: int):
        self.conn = conn
        self.parent_pid = parent_pid
        self.last = 0.0
        self.cancelled = False
        self.pending = None

    def progress(self, stage: str, fraction: float, info: dict | None = None) -> None:
        now = time.monotonic()
        if now - self.last < PROGRESS_INTERVAL_S:
            self.pending = (stage, fraction, info)  # sent at the next slot, so the latest state is never lost
            return
        self.last = now
        self.pending = None
        self.conn.send(("progress", str(stage)[:64], float(fraction), _plain_info(info)))

    def should_stop(self) -> bool:
        if self.pending is not None and time.monotonic() - self.last >= PROGRESS_INTERVAL_S:
            self.progress(*self.pending)
        if self.cancelled:
            return True
        if os.getppid() != self.parent_pid:
            self.cancelled = True  # the server is gone: nobody will collect the result
            return True
        try:
            while self.conn.poll(0):
                if self.conn.recv()[0] == "cancel":
                    self.cancelled = True
        except (EOFError, OSError):
            self.cancelled = True
        return self.cancelled


def _plain_info(info) -> dict:
    out = {}
    for k, v in list((info or {}).items())[:8]:
        if isinstance(v, bool) or isinstance(v, int) and abs(v) < 2**53:
            out[str(k)[:32]] = v
        elif isinstance(v, float) and math.isfinite(v):
            out[str(k)[:32]] = v
        elif isinstance(v, str):
            out[str(k)[:32]] = v[:120]
    return out


def prepare_process(memory_bytes: int | None, cpu_seconds: float | None, log_path: str | None = None) -> None:
    """What every process the server spawns does first: private files (umask 0o077), standard error
    into its own log (fatal signals print the Python stack there), die with the server, limits."""
    os.umask(0o077)
    if log_path:
        fd = os.open(log_path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600)
        os.dup2(fd, 2)
        os.close(fd)
        sys.stderr = open(2, "w", encoding="utf-8", errors="replace", buffering=1, closefd=False)
    faulthandler.enable()
    die_with_parent()
    set_limits(memory_bytes, cpu_seconds)


def main(conn, spec: dict) -> None:
    """Process entry point: run one job and report exactly one final message.

    Any failure, set-up included, is reported with its text; a worker that dies without a word
    (a signal, os._exit) leaves its last lines in spec["log_path"], which the server quotes.
    """
    try:
        conn.send(("started", os.getpid()))
        prepare_process(spec.get("memory_bytes"), spec.get("cpu_seconds"), spec.get("log_path"))
        channel = _Channel(conn, spec["parent_pid"])
        conn.send(report_of(run_job, spec, channel))
    except BaseException as exc:  # set-up failed (a report could not even be built): still say why
        try:
            conn.send(("failed", "job_failed", f"the worker could not start the job ({type(exc).__name__}: "
                                               f"{_one_line(exc)})"))
        except (OSError, ValueError):
            pass
    finally:
        conn.close()


def report_of(run, spec: dict, channel) -> tuple:
    """The one final message for a job: ("done", record), ("cancelled", text) or ("failed", code, text)."""
    from ..errors import Cancelled, InvalidInput, InvalidMesh, IsoclayError

    try:
        return ("done", run(spec, channel))
    except Cancelled as exc:
        return ("cancelled", str(exc))
    except InvalidMesh as exc:
        return ("failed", "invalid_mesh", str(exc))
    except InvalidInput as exc:
        return ("failed", "invalid_input", str(exc))
    except IsoclayError as exc:
        return ("failed", "job_failed", str(exc))
    except MemoryError:
        return ("failed", "job_failed", "ran out of memory within the solver's limit: decimate the mesh, lower the "
                                        "resolution, or raise --memory-limit")
    except Exception as exc:  # one line for the user; the server keeps serving
        return ("failed", "job_failed", f"internal error in the worker ({type(exc).__name__}: {_one_line(exc)})")


def _one_line(exc) -> str:
    return " ".join(str(exc).split())[:200]


def run_job(spec: dict, channel: _Channel) -> dict:
    from ..errors import Cancelled
    from ..history.blobs import BlobStore, pack_mesh, unpack_mesh
    from .handle_groups import echo_report, restore_points

    blobs = BlobStore(spec["blob_root"])
    v, f, values = unpack_mesh(blobs.read(spec["input_blob"]))
    params = restore_points(spec["params"], blobs)  # handle groups' points back from their blob
    if spec["task"] == "echo":
        record = _test_echo(spec, channel, blobs, v, f)
        record["metrics"].update(echo_report(params))
        return record

    import numpy as np

    from ..field.cache import FieldCache
    from ..mesh.types import TriangleMesh
    from ..runtime import configure_torch

    configure_torch(spec.get("threads"))
    from ..field.checkpoint import load_field, save_field
    from ..pipeline import fit_config_for, fit_key, prepare_mesh, run_edit
    from ..summaries import describe_edit
    from .param_check import fit_config_of

    fit_config, params = fit_config_of(params, int(spec.get("seed", 0)))
    mesh = TriangleMesh(np.array(v), np.array(f))
    prepared = prepare_mesh(mesh)
    # the fit this task would make (smooth caps its resolution), else the full one if cached
    keys = [fit_key(prepared.mesh_hash, fit_config_for(spec["task"], params, prepared.normalization, fit_config)),
            fit_key(prepared.mesh_hash, fit_config)]
    cache = FieldCache(spec["cache_root"], spec["cache_max_bytes"])
    field, cache_hit = None, False
    if spec.get("start_field_blob"):
        _import_field_kinds()  # a node's field may be of a kind a task module registers (e.g. a warped field)
        field, _ = load_field(blobs.path(spec["start_field_blob"]))
    else:
        for key in dict.fromkeys(keys):
            hit = cache.get(key)
            if hit is not None:
                field, cache_hit = hit[0], True
                break
    if channel.should_stop():
        raise Cancelled("cancelled before the edit started; nothing was written")
    outcome = run_edit(mesh, spec["task"], params, field=field, fit_config=fit_config, progress=channel.progress,
                       should_stop=channel.should_stop, seed=int(spec.get("seed", 0)), prepared=prepared)
    out = outcome.mesh
    result_blob = blobs.put_bytes(pack_mesh(out.vertices, out.faces, out.vertex_values,  # the edit itself first
                                            correspondence_arrays(outcome.correspondence)))
    warnings = [str(w)[:300] for w in outcome.warnings]
    tmp_dir = blobs.root / "tmp"
    tmp_dir.mkdir(exist_ok=True, mode=0o700)
    tmp = tmp_dir / f"{os.getpid()}-field.pt"
    field_blob = result_field_blob = None
    try:
        if outcome.field is not None:  # (a task that needs no field, decimate, fits none)
            save_field(tmp, outcome.field, {"fit_key": outcome.fit_key, "task": spec["task"]})
            field_blob = blobs.put_file(tmp)
        if field is None and outcome.field is not None:  # freshly fitted: keep it for the next edit of the same mesh and settings
            cache_tmp = tmp_dir / f"{os.getpid()}-cache.pt"
            save_field(cache_tmp, outcome.field, {"cache_key": outcome.fit_key})
            cache.adopt(outcome.fit_key, cache_tmp)
        if outcome.result_field is not None:
            save_field(tmp, outcome.result_field, {"task": spec["task"]})
            result_field_blob = blobs.put_file(tmp)
    except Exception as exc:  # the mesh is the edit; a field that cannot be stored only limits branching
        warnings.append(f"field checkpoint not stored ({type(exc).__name__}): a later edit from this node refits")
    metrics = {str(k): x for k, x in ((k, _json_ready(x)) for k, x in outcome.metrics.items())
               if isinstance(x, float) or isinstance(x, int) and not isinstance(x, bool)}
    seconds = {k: float(x) for k, x in outcome.seconds.items()}
    report = dict(outcome.report) if isinstance(outcome.report, dict) else {}
    report.setdefault("seconds", seconds)
    report["field_cache_hit"] = cache_hit
    report["params"] = spec["params"]  # as stored: handle points stay in their blob, not in every reply
    report["summary"] = describe_edit(spec["task"], spec["params"])
    return {"result_blob": result_blob, "field_blob": field_blob, "result_field_blob": result_field_blob,
            "metrics": metrics, "report": _json_ready(report), "warnings": warnings}


def correspondence_arrays(correspondence) -> dict:
    """The arrays stored with a result mesh for the add-on: source_face (n,) <i4, source_bary (n, 3) <f4."""
    if correspondence is None:
        return {}
    import numpy as np

    return {"source_face": np.asarray(correspondence.face, "<i4"), "source_bary": np.asarray(correspondence.bary, "<f4")}


def _import_field_kinds() -> None:
    """Import every task module so field kinds they define are registered for checkpoint loading."""
    import importlib

    from ..tasks.registry import TASK_MODULES

    for module in TASK_MODULES.values():
        try:
            importlib.import_module(module)
        except ImportError:  # a task not installed here cannot have made the checkpoint either
            pass


def _json_ready(value, depth=0):
    """Drop what JSON/msgpack cannot carry (numpy scalars become floats, arrays are left out)."""
    if depth > 6:
        return None
    if isinstance(value, dict):
        return {str(k): _json_ready(v, depth + 1) for k, v in value.items() if _json_ready(v, depth + 1) is not None
                or v is None}
    if isinstance(value, (list, tuple)):
        return [_json_ready(v, depth + 1) for v in value][:1000]
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, int):
        return float(value) if abs(value) >= 2**63 else int(value)
    try:
        x = float(value)
        return x if math.isfinite(x) else None
    except (TypeError, ValueError):
        return None


def _test_echo(spec, channel, blobs, v, f) -> dict:
    """The echo task with test knobs (only when the server runs with test parameters enabled).

    delay_s : seconds of cooperative work in steps (progress + stop checks)
    ignore_cancel : keep working after a cancel (exercises terminate escalation)
    crash : "exit" (a line on stderr, exit code 3), "abort" (SIGABRT), "raise" (exception), "memory" (allocate
        past the limit)
    """
    import numpy as np

    from ..errors import Cancelled
    from ..history.blobs import pack_mesh

    params = spec["params"]
    delay = float(params.get("delay_s", 0.0))
    steps = max(1, int(params.get("steps", 20)))
    crash = params.get("crash")
    for i in range(steps):
        if delay:
            time.sleep(delay / steps)
        channel.progress("echo", (i + 1) / steps, {"step": i + 1})
        if channel.should_stop() and not params.get("ignore_cancel"):
            raise Cancelled("cancelled during echo; nothing was written")
        if crash and i == steps // 2:
            if crash == "exit":
                sys.stderr.write("deliberate exit for a test\n")
                sys.stderr.flush()
                os._exit(3)
            if crash == "abort":
                os.abort()
            if crash == "raise":
                raise RuntimeError("deliberate failure for a test")
            if crash == "memory":
                np.ones(int(spec["memory_bytes"]) // 8 + 1)
    result_blob = blobs.put_bytes(pack_mesh(v, f))
    return {"result_blob": result_blob, "field_blob": None, "result_field_blob": None,
            "metrics": {"vertices": float(len(v))}, "report": {"task": "echo"}, "warnings": []}
