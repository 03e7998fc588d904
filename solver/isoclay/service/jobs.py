"""Jobs: idempotent submission, a bounded queue, one limited worker process per job, cancel escalation.

The manager lives in the server's message loop (one thread): ``pump`` is called every loop
turn to collect worker messages, enforce time limits, escalate cancels (cooperative first,
terminate after ``cancel_grace_s``, kill after twice that) and notice crashed workers. A job
is reported done only after its history node is committed (durable).
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import time
from collections import OrderedDict, deque
from dataclasses import dataclass, field
from pathlib import Path

from .. import wire
from ..estimates import estimate_memory
from ..history.blobs import MESH_MAGIC, BlobStore, pack_mesh, unpack_arrays, unpack_mesh
from ..history.store import HistoryStore, JobRow
from . import handle_groups

#: Parameters the echo task accepts only when a server runs with test parameters enabled
#: ("groups": handle groups whose received points the echo reports, for the handle-frame plumbing).
ECHO_TEST_PARAMS = {"delay_s", "steps", "ignore_cancel", "crash", "groups"}


class ServiceError(Exception):
    """A request the server refuses; ``code`` goes into the error reply."""

    def __init__(self, code: str, message: str):
        super().__init__(message)
        self.code = code


@dataclass
class JobLimits:
    """Resource limits of the service (see `isoclay serve --help`)."""

    max_queue: int = 16  # queued jobs beyond the running ones; more get "busy"
    max_workers: int = 1  # jobs running at once
    memory_bytes: int = 8 << 30  # address-space limit of a worker process
    time_s: float = 3600.0  # wall-clock limit of one job
    cancel_grace_s: float = 0.8  # cooperative stop time before terminate (kill after twice this)
    threads: int | None = None  # torch threads per worker (default: free cores)
    cache_max_bytes: int = 2 << 30
    test_params: bool = False  # allow echo's test knobs (delay, crash...): tests and benchmarks only


@dataclass
class Job:
    row: JobRow
    state: str
    stage: str = ""
    fraction: float = 0.0
    info: dict = field(default_factory=dict)
    error: str | None = None
    node_id: str | None = None
    warnings: list = field(default_factory=list)
    process: object = None
    conn: object = None
    started: float = 0.0
    cancel_at: float | None = None
    final: tuple | None = None

    def as_reply(self) -> dict:
        return {"job_id": self.row.job_id, "state": self.state, "stage": self.stage, "fraction": float(self.fraction),
                "info": self.info, "error": self.error, "node_id": self.node_id, "task": self.row.task,
                "source_key": self.row.source_key, "warnings": list(self.warnings)}


def known_tasks() -> set[str]:
    from ..tasks.registry import TASK_MODULES  # no torch: the registry names modules, it does not import them

    return {"echo", *TASK_MODULES}


class JobManager:
    def __init__(self, store: HistoryStore, blobs: BlobStore, cache_root: Path, limits: JobLimits):
        self.store = store
        self.blobs = blobs
        self.cache_root = Path(cache_root)
        self.limits = limits
        self.live: dict[str, Job] = {}
        self.queue: deque[str] = deque()
        self._ctx = multiprocessing.get_context("spawn")
        self.probes: OrderedDict[str, tuple] = OrderedDict()
        self.exiting: list = []  # (process, since) of workers that reported and are exiting
        self.crashes = 0

    # ---------------------------------------------------------------- requests

    def submit(self, msg: wire.Message) -> dict:
        body, arrays = msg.body, msg.arrays
        job_id = body["job_id"]
        existing = self._job(job_id)
        if existing is not None:
            if existing.state == "interrupted":
                return self.resume(job_id)
            return existing.as_reply()  # idempotent: never a second job or history node
        task = body["task"]
        if task not in known_tasks():
            raise ServiceError("unknown_task", f"unknown task {task!r}: this solver offers {', '.join(sorted(known_tasks()))}")
        params = body["params"]
        self._check_params(task, params)
        frames = self._handle_frames(params, arrays)
        if len(self.queue) >= self.limits.max_queue:
            raise ServiceError("busy", f"the solver's queue is full ({self.limits.max_queue} jobs): wait for a job "
                                       "to finish or cancel one")
        source, base = body["source_key"], body["parent_node"]
        base_row = None
        if base is not None:
            base_row = self.store.node(base)
            if base_row is None:
                raise ServiceError("unknown_node", f"node {base} is not in this solver's history: list it with history")
            if base_row.source_key != source:
                raise ServiceError("invalid_input", f"node {base} belongs to {base_row.source_key!r}, not {source!r}")
        probe = task == "echo" and not (set(params) & ECHO_TEST_PARAMS)
        if probe:
            return self._echo_probe(msg, base_row)
        if "vertices" in arrays or "faces" in arrays:
            mesh_hash = self._store_mesh(msg)
        elif body["mesh_hash"] is not None:
            mesh_hash = body["mesh_hash"]
            if self.store.mesh_blob(mesh_hash) is None:
                raise ServiceError("need_mesh", "the solver does not have this mesh yet: send it with the request")
        elif base_row is not None:
            mesh_hash = None  # start from the node's result mesh
        else:
            raise ServiceError("invalid_input", "submit needs a mesh or a parent_node to start from")
        n_v, n_f = self._mesh_size(mesh_hash, base_row)
        need = estimate_memory(task, n_v, n_f, params)
        if need > self.limits.memory_bytes:
            raise ServiceError("invalid_input", f"this job needs about {need / 2**30:.1f} GiB, the solver allows "
                                                f"{self.limits.memory_bytes / 2**30:.1f} GiB: decimate the mesh, lower "
                                                "params.fit.resolution, or raise --memory-limit")
        params = handle_groups.store_frames(params, frames, self.blobs)  # durable before the row that names it
        row, _ = self.store.create_job(job_id, source, task, params, mesh_hash, base)
        job = Job(row, row.state)
        self._remember(job)
        self.queue.append(job_id)
        self._start_queued()
        return job.as_reply()

    def poll(self, job_id: str) -> dict:
        job = self._job(job_id)
        if job is None:
            raise ServiceError("unknown_job", f"no job {job_id!r} on this solver: submit it (again)")
        return job.as_reply()

    def cancel(self, job_id: str) -> dict:
        job = self._job(job_id)
        if job is None:
            raise ServiceError("unknown_job", f"no job {job_id!r} on this solver")
        if job.state == "queued":
            if job_id in self.queue:
                self.queue.remove(job_id)
            self._set_final(job, "cancelled", "cancelled before it started")
        elif job.state == "running" and job.cancel_at is None:
            job.cancel_at = time.monotonic()
            try:
                job.conn.send(("cancel",))
            except (OSError, ValueError, BrokenPipeError):
                pass
        return job.as_reply()

    def resume(self, job_id: str) -> dict:
        job = self._job(job_id)
        if job is None:
            raise ServiceError("unknown_job", f"no job {job_id!r} on this solver")
        if job.state == "interrupted":
            if len(self.queue) >= self.limits.max_queue:
                raise ServiceError("busy", "the solver's queue is full: resume later")
            self.store.set_job_state(job_id, "queued")
            job.state, job.error, job.stage, job.fraction = "queued", None, "", 0.0
            self.queue.append(job_id)
            self._start_queued()
        return job.as_reply()

    def result(self, job_id: str) -> tuple[dict, dict, dict | None]:
        job = self._job(job_id)
        if job is None:
            raise ServiceError("unknown_job", f"no job {job_id!r} on this solver")
        if job.state in ("failed", "cancelled"):
            raise ServiceError("job_failed", f"job {job_id} {job.state}: {job.error or 'no result'}")
        if job.state != "done":
            raise ServiceError("not_ready", f"job {job_id} is {job.state}: poll until it is done")
        if job.node_id is None:  # an echo probe: its result lives in memory only
            kept = self.probes.get(job_id)
            if kept is None:
                raise ServiceError("unknown_job", f"the echo result of {job_id} has expired: submit again")
            arrays, digests = kept
            body = {"node_id": "", "job_id": job_id, "task": "echo", "metrics": {"vertices": float(len(arrays["vertices"]))},
                    "report": {"task": "echo"}, "warnings": []}
            return body, arrays, digests
        return self.node_mesh(job.node_id)

    def node_mesh(self, node_id: str) -> tuple[dict, dict, None]:
        node = self.store.node(node_id)
        if node is None:
            raise ServiceError("unknown_node", f"node {node_id} is not in this solver's history")
        data = self.blobs.read(node.result_blob)
        v, f, values = unpack_mesh(data)
        v, f = wire.canonical_mesh(v, f)
        arrays = {"vertices": v, "faces": f, **{f"value:{k}": a for k, a in values.items()}, **correspondence_of(data)}
        body = {"node_id": node.node_id, "job_id": node.job_id, "task": node.task, "metrics": node.metrics,
                "report": node.report, "warnings": node.warnings}
        return body, arrays, None

    # ---------------------------------------------------------------- loop work

    def pump(self) -> None:
        """Collect worker messages, enforce limits, start queued jobs; quick, called every loop turn."""
        now = time.monotonic()
        for job in [j for j in self.live.values() if j.state == "running"]:
            self._drain(job)
            proc = job.process
            if job.final is not None or not proc.is_alive():
                if proc.is_alive():  # reported and now exiting: reap later, never block the loop
                    self.exiting.append((proc, now))
                else:
                    proc.join(timeout=0)
                self._drain(job)
                self._conclude(job)
                continue
            if job.cancel_at is not None:
                waited = now - job.cancel_at
                if waited > 2 * self.limits.cancel_grace_s:
                    proc.kill()
                elif waited > self.limits.cancel_grace_s:
                    proc.terminate()
            elif now - job.started > self.limits.time_s:
                job.final = ("failed", "job_failed", f"exceeded the solver's time limit of {self.limits.time_s:g} s: "
                                                     "use a lower resolution or raise --time-limit")
                proc.kill()
        for item in list(self.exiting):
            proc, since = item
            if not proc.is_alive():
                proc.join(timeout=0)
                self.exiting.remove(item)
            elif now - since > 5.0:
                proc.kill()
        self._start_queued()

    def running(self) -> int:
        return sum(1 for j in self.live.values() if j.state == "running")

    def shutdown(self) -> None:
        for job in self.live.values():
            if job.state == "running" and job.process is not None:
                job.process.kill()
                job.process.join(timeout=2.0)
        for proc, _ in self.exiting:
            proc.join(timeout=2.0)
            if proc.is_alive():
                proc.kill()

    # ---------------------------------------------------------------- internals

    def _job(self, job_id: str) -> Job | None:
        job = self.live.get(job_id)
        if job is None:
            row = self.store.job(job_id)
            if row is None:
                return None
            job = Job(row, row.state, error=row.error, node_id=row.node_id,
                      stage="done" if row.state == "done" else "", fraction=1.0 if row.state == "done" else 0.0)
            if row.node_id:
                node = self.store.node(row.node_id)
                job.warnings = list(node.warnings) if node else []
            self._remember(job)
        return job

    def _remember(self, job: Job) -> None:
        self.live[job.row.job_id] = job
        if len(self.live) > 4096:  # forget finished jobs first; they stay in the database
            for jid in [k for k, j in self.live.items() if j.state in wire.FINAL_STATES][:1024]:
                self.live.pop(jid, None)

    def _check_params(self, task: str, params: dict) -> None:
        if task == "echo":
            extra = set(params) - (ECHO_TEST_PARAMS if self.limits.test_params else set())
            if extra:
                raise ServiceError("invalid_input", f"echo takes no parameters, got {sorted(extra)[:3]}")
            delay = params.get("delay_s", 0.0)
            if not isinstance(delay, (int, float)) or not 0 <= delay <= 600:
                raise ServiceError("invalid_input", "echo delay_s must be 0..600 seconds")
            steps = params.get("steps", 20)
            if not isinstance(steps, int) or not 1 <= steps <= 10_000:
                raise ServiceError("invalid_input", "echo steps must be an integer 1..10000")

    @staticmethod
    def _handle_frames(params: dict, arrays: dict) -> dict:
        """The request's handles:<i> frames, checked against params.groups (one-line refusal)."""
        try:
            return handle_groups.check_frames(params, arrays)
        except handle_groups.HandleFrameError as exc:
            raise ServiceError("invalid_input", str(exc)) from None

    def _checked_mesh(self, msg: wire.Message):
        try:
            v, f = wire.mesh_arrays(msg)
        except wire.WireError as exc:
            raise ServiceError(exc.code, str(exc)) from None
        actual = wire.message_mesh_hash(msg)  # from the frame digests checked on arrival: no second pass
        if msg.body["mesh_hash"] is not None and msg.body["mesh_hash"] != actual:
            raise ServiceError("bad_message", "mesh_hash does not match the uploaded arrays: resend the mesh")
        return v, f, actual

    def _echo_probe(self, msg: wire.Message, base_row) -> dict:
        """The no-op task, answered at once: validate the mesh and keep it (in memory) as the result."""
        body = msg.body
        digests = None
        if "vertices" in msg.arrays or "faces" in msg.arrays:
            v, f, mesh_hash = self._checked_mesh(msg)
            digests = {k: msg.digests[k] for k in ("vertices", "faces")}
        elif body["mesh_hash"] is not None:
            mesh_hash = body["mesh_hash"]
            blob = self.store.mesh_blob(mesh_hash)
            if blob is None:
                raise ServiceError("need_mesh", "the solver does not have this mesh yet: send it with the request")
            v, f, _ = unpack_mesh(self.blobs.read(blob))
        elif base_row is not None:
            mesh_hash = None
            v, f, _ = unpack_mesh(self.blobs.read(base_row.result_blob))
        else:
            raise ServiceError("invalid_input", "submit needs a mesh or a parent_node to start from")
        v, f = wire.canonical_mesh(v, f)
        now = time.time()
        row = JobRow(body["job_id"], body["source_key"], "echo", body["params"], mesh_hash, body["parent_node"], "",
                     "done", None, None, now, 1)
        job = Job(row, "done", stage="done", fraction=1.0)
        self._remember(job)
        self.probes[row.job_id] = ({"vertices": v, "faces": f}, digests)
        while len(self.probes) > 8:
            self.probes.popitem(last=False)
        return job.as_reply()

    def _store_mesh(self, msg: wire.Message) -> str:
        v, f, actual = self._checked_mesh(msg)
        if self.store.mesh_blob(actual) is None:
            blob = self.blobs.put_bytes(pack_mesh(v, f))  # durable before the row that names it
            self.store.add_mesh(actual, blob, len(v), len(f))
        return actual

    def _mesh_size(self, mesh_hash: str | None, base_row) -> tuple[int, int]:
        if mesh_hash is not None:
            row = self.store.db.execute("SELECT n_vertices, n_faces FROM meshes WHERE mesh_hash=?", (mesh_hash,)).fetchone()
            return int(row[0]), int(row[1])
        v, f, _ = unpack_mesh(self.blobs.read(base_row.result_blob, verify=False))
        return len(v), len(f)

    def _input_blob(self, row: JobRow) -> str:
        if row.mesh_hash is not None:
            return self.store.mesh_blob(row.mesh_hash)
        return self.store.node(row.base_node).result_blob

    def _commit(self, job: Job, record: dict) -> None:
        input_hash = job.row.mesh_hash or self._input_blob(job.row)
        node_id = self.store.finish_job(job.row.job_id, dict(record, node_id=wire.new_id(), input_hash=input_hash))
        job.state, job.node_id, job.stage, job.fraction, job.error = "done", node_id, "done", 1.0, None
        job.warnings = list(record.get("warnings", []))

    def _set_final(self, job: Job, state: str, error: str | None) -> None:
        self.store.set_job_state(job.row.job_id, state, error)
        job.state, job.error = state, error

    def _start_queued(self) -> None:
        while self.queue and self.running() < self.limits.max_workers:
            job = self.live.get(self.queue.popleft())
            if job is None or job.state != "queued":
                continue
            self._spawn(job)

    def _spawn(self, job: Job) -> None:
        from . import worker

        row = job.row
        start_field = None
        if row.base_node:
            base = self.store.node(row.base_node)
            start_field = base.result_field_blob or base.field_blob
        spec = {"job_id": row.job_id, "task": row.task, "params": row.params, "input_blob": self._input_blob(row),
                "start_field_blob": start_field, "blob_root": str(self.blobs.root), "cache_root": str(self.cache_root),
                "cache_max_bytes": self.limits.cache_max_bytes, "memory_bytes": self.limits.memory_bytes,
                "cpu_seconds": self.limits.time_s * 4, "threads": self.limits.threads, "parent_pid": os.getpid()}
        parent, child = self._ctx.Pipe()
        proc = self._ctx.Process(target=worker.main, args=(child, spec), daemon=True, name=f"isoclay-job-{row.job_id}")
        proc.start()
        child.close()
        job.process, job.conn, job.started, job.final, job.cancel_at = proc, parent, time.monotonic(), None, None
        job.state, job.stage, job.fraction = "running", "starting", 0.0
        self.store.set_job_state(row.job_id, "running", count_attempt=True)

    def _drain(self, job: Job) -> None:
        conn = job.conn
        try:
            while conn.poll(0):
                msg = conn.recv()
                if msg[0] == "progress":
                    job.stage, job.fraction, job.info = msg[1], min(1.0, max(0.0, msg[2])), msg[3]
                elif job.final is None:
                    job.final = msg
        except (EOFError, OSError):
            pass

    def _conclude(self, job: Job) -> None:
        final = job.final
        job.conn.close()
        if final is not None and final[0] == "done":
            self._commit(job, final[1])
        elif final is not None and final[0] == "cancelled" or job.cancel_at is not None and final is None:
            self._set_final(job, "cancelled", final[1] if final else "cancelled (the worker was stopped)")
        elif final is not None and final[0] == "failed":
            self._set_final(job, "failed", final[2])
        else:
            self.crashes += 1
            self._set_final(job, "failed", crash_reason(job.process.exitcode, self.limits))
        job.process = None


def correspondence_of(mesh_blob) -> dict:
    """source_face / source_bary stored with a result mesh (see worker.correspondence_arrays), or {}."""
    return {k: a for k, a in unpack_arrays(mesh_blob, MESH_MAGIC).items() if k in ("source_face", "source_bary")}


def crash_reason(exitcode, limits: JobLimits) -> str:
    """One line explaining how a worker died without reporting."""
    if exitcode is not None and exitcode < 0:
        try:
            name = signal.Signals(-exitcode).name
        except ValueError:
            name = f"signal {-exitcode}"
        if name == "SIGXCPU":
            return "the worker hit the solver's CPU-time limit: lower the resolution or raise --time-limit"
        if name == "SIGKILL":
            return ("the worker was killed (SIGKILL), most likely out of memory: decimate the mesh or lower "
                    "params.fit.resolution")
        return f"the worker crashed ({name}): the server keeps serving; retry, and report it if it repeats"
    return f"the worker exited unexpectedly (exit code {exitcode}): retry, and report it if it repeats"
