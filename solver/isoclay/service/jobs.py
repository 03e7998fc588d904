"""Jobs: idempotent submission, a bounded queue, one limited worker process per job, cancel escalation.

The manager lives in the server's message loop (one thread): ``pump`` is called every loop
turn to collect worker messages, enforce time limits, escalate cancels (cooperative first,
terminate after ``cancel_grace_s``, kill after twice that) and notice crashed workers. A job
is reported done only after its history node is committed (durable).

Everything a submit can be refused for is checked before anything is stored: the task's own
parameters (its Config.from_params, run by the checker process), fit settings, handle counts,
the memory estimate and the data folder's room. Uploads that only failed or cancelled jobs
used are removed again, and blobs nothing names are collected when no worker runs.

History is scoped by owner (the client's CURVE key, see server.py): a source key is stored as
"<owner>\\x1f<source key>", so another owner's jobs, nodes and pointers are invisible to it.
"""

from __future__ import annotations

import json
import multiprocessing
import os
import time
from collections import OrderedDict, deque
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .. import wire
from ..bounds import shown_bytes
from ..estimates import estimate_memory
from ..history.blobs import MESH_MAGIC, BlobStore, pack_mesh, unpack_arrays, unpack_mesh
from ..history.store import HistoryStore, JobRow
from . import crashes, handle_groups, processes
from .limits import JobLimits, check_handle_counts
from .param_check import ParamChecker
from .storage import DataFolder

__all__ = ["ECHO_TEST_PARAMS", "Job", "JobLimits", "JobManager", "ServiceError", "known_tasks"]

#: Parameters the echo task accepts only when a server runs with test parameters enabled
#: ("groups": handle groups whose received points the echo reports, for the handle-frame plumbing).
ECHO_TEST_PARAMS = {"delay_s", "steps", "ignore_cancel", "crash", "groups"}
#: Keys the service adds to stored parameters (not part of what a client sent).
SERVER_PARAM_KEYS = {"handle_blob"}
#: Separates an owner from a source key in stored source keys (refused inside client source keys).
SCOPE_SEP = "\x1f"
#: How often a running worker's peak memory is read (seconds).
RSS_SAMPLE_S = 0.5
#: A solver process (preload_checker) starts its parameter checker once it has been up this long
#: with no job running, so loading torch there never competes with the first jobs; a submit that
#: needs it earlier starts it at once.
CHECKER_PRELOAD_AFTER_S = 5.0


class ServiceError(Exception):
    """A request the server refuses; ``code`` goes into the error reply."""

    def __init__(self, code: str, message: str):
        super().__init__(message)
        self.code = code


def scoped(owner: str, source_key: str) -> str:
    """The stored source key of an owner's object ("" owner = shared history: the key itself)."""
    if SCOPE_SEP in source_key:
        raise ServiceError("invalid_input", "source_key must not contain control character 0x1f: rename the object")
    return f"{owner}{SCOPE_SEP}{source_key}" if owner else source_key


def owns(owner: str, stored_source: str) -> bool:
    return not owner or stored_source.startswith(owner + SCOPE_SEP)


def external(stored_source: str) -> str:
    """The source key as its owner sent it."""
    return stored_source.split(SCOPE_SEP, 1)[1] if SCOPE_SEP in stored_source else stored_source


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
    log_path: Path | None = None
    evidence: crashes.Evidence = field(default_factory=crashes.Evidence)
    oom_before: int | None = None
    sampled: float = 0.0

    def as_reply(self) -> dict:
        return {"job_id": self.row.job_id, "state": self.state, "stage": self.stage, "fraction": float(self.fraction),
                "info": self.info, "error": self.error, "node_id": self.node_id, "task": self.row.task,
                "source_key": external(self.row.source_key), "warnings": list(self.warnings)}


def known_tasks() -> set[str]:
    from ..tasks.registry import TASK_MODULES  # no torch: the registry names modules, it does not import them

    return {"echo", *TASK_MODULES}


def normalization_of(vertices: np.ndarray, faces: np.ndarray) -> tuple[tuple, float]:
    """(center, scale) of mesh.Normalization.of over the vertices the faces use (numpy only, no torch)."""
    used = np.zeros(len(vertices), bool)
    used[np.asarray(faces).ravel()] = True
    points = vertices[used] if used.any() else vertices
    lo, hi = points.min(axis=0), points.max(axis=0)
    extent = float(np.max(hi - lo))
    return tuple(float(c) for c in (lo + hi) / 2), (1.0 / extent if extent > 0 else 1.0)


class JobManager:
    def __init__(self, store: HistoryStore, blobs: BlobStore, cache_root: Path, limits: JobLimits,
                 data_root: Path | None = None):
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
        self.checker = ParamChecker(limits.memory_bytes)
        self.data = DataFolder(data_root or Path(blobs.root).parent, store, blobs, self.cache_root,
                               limits.data_max_bytes)
        self._facts: OrderedDict[str, tuple] = OrderedDict()  # blob -> (n_vertices, n_faces, center, scale)
        self._collect_due = True
        self.preload_checker = False  # run_server sets it: load the checker when idle
        self._born = time.monotonic()

    # ---------------------------------------------------------------- requests

    def submit(self, msg: wire.Message, owner: str = "") -> dict:
        body, arrays = msg.body, msg.arrays
        job_id = body["job_id"]
        source = scoped(owner, body["source_key"])
        existing = self._job(job_id)
        if existing is not None:
            if not owns(owner, existing.row.source_key):
                raise ServiceError("invalid_input", f"job id {job_id!r} is taken: use a fresh id (uuid4) for a new edit")
            self._check_same_request(existing, body, source)
            if existing.state == "interrupted":
                return self.resume(job_id, owner)
            return existing.as_reply()  # idempotent: never a second job or history node
        task = body["task"]
        if task not in known_tasks():
            raise ServiceError("unknown_task", f"unknown task {task!r}: this solver offers {', '.join(sorted(known_tasks()))}")
        params = body["params"]
        self._check_params(task, params)
        frames = self._handle_frames(params, arrays)
        check_handle_counts(params, arrays)
        if len(self.queue) >= self.limits.max_queue:
            raise ServiceError("busy", f"the solver's queue is full ({self.limits.max_queue} jobs): wait for a job "
                                       "to finish or cancel one")
        base = body["parent_node"]
        base_row = None
        if base is not None:
            base_row = self.store.node(base)
            if base_row is None or not owns(owner, base_row.source_key):
                raise ServiceError("unknown_node", f"node {base} is not in this solver's history: list it with history")
            if base_row.source_key != source:
                raise ServiceError("invalid_input", f"node {base} belongs to {external(base_row.source_key)!r}, "
                                                    f"not {body['source_key']!r}")
        if task == "echo" and not (set(params) & ECHO_TEST_PARAMS):
            return self._echo_probe(msg, base_row, source, owner)
        upload = "vertices" in arrays or "faces" in arrays
        if upload:
            v, f, mesh_hash = self._checked_mesh(msg)
            n_v, n_f = len(v), len(f)
            center, scale = normalization_of(v, f)
        elif body["mesh_hash"] is not None:
            mesh_hash = body["mesh_hash"]
            blob = self.store.mesh_blob(mesh_hash, owner and owner + SCOPE_SEP)
            if blob is None:
                raise ServiceError("need_mesh", "the solver does not have this mesh yet: send it with the request")
            n_v, n_f, center, scale = self._mesh_facts(blob)
        elif base_row is not None:
            mesh_hash = None  # start from the node's result mesh
            n_v, n_f, center, scale = self._mesh_facts(base_row.result_blob)
        else:
            raise ServiceError("invalid_input", "submit needs a mesh or a parent_node to start from")
        if task != "echo":  # the task's own refusal first: it names the setting, the estimate only its cost
            verdict = self.checker.check(task, handle_groups.with_points(params, frames), center, scale)
            if verdict is not None:
                raise ServiceError(*verdict)
        need = estimate_memory(task, n_v, n_f, params)
        if need > self.limits.memory_bytes:
            allowed = shown_bytes(self.limits.memory_bytes)
            amount = f"far more memory than the {allowed}" if need > 64 * self.limits.memory_bytes else \
                f"about {shown_bytes(need)}, more than the {allowed}"
            raise ServiceError("invalid_input", f"this job needs {amount} the solver allows: decimate the mesh, "
                                                "lower params.fit.resolution, or raise --memory-limit")
        self.data.require_room(24 * (n_v + n_f) if upload and self.store.mesh_blob(mesh_hash) is None else 0)
        if upload:
            self._store_mesh(v, f, mesh_hash)
        params = handle_groups.store_frames(params, frames, self.blobs)  # durable before the row that names it
        row, _ = self.store.create_job(job_id, source, task, params, mesh_hash, base)
        job = Job(row, row.state)
        self._remember(job)
        self.queue.append(job_id)
        self._start_queued()
        return job.as_reply()

    def poll(self, job_id: str, owner: str = "") -> dict:
        return self._owned_job(job_id, owner, "submit it (again)").as_reply()

    def cancel(self, job_id: str, owner: str = "") -> dict:
        job = self._owned_job(job_id, owner)
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

    def resume(self, job_id: str, owner: str = "") -> dict:
        job = self._owned_job(job_id, owner)
        if job.state == "interrupted":
            if len(self.queue) >= self.limits.max_queue:
                raise ServiceError("busy", "the solver's queue is full: resume later")
            self.store.set_job_state(job_id, "queued")
            job.state, job.error, job.stage, job.fraction = "queued", None, "", 0.0
            self.queue.append(job_id)
            self._start_queued()
        return job.as_reply()

    def result(self, job_id: str, owner: str = "") -> tuple[dict, dict, dict | None]:
        job = self._owned_job(job_id, owner)
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
        return self.node_mesh(job.node_id, owner)

    def node_mesh(self, node_id: str, owner: str = "") -> tuple[dict, dict, None]:
        node = self.store.node(node_id)
        if node is None or not owns(owner, node.source_key):
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
            if now - job.sampled > RSS_SAMPLE_S:
                job.sampled = now
                rss = crashes.peak_rss(proc.pid)
                if rss is not None:
                    job.evidence.peak_rss = max(rss, job.evidence.peak_rss or 0)
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
        idle = not self.exiting and self.running() == 0
        if self._collect_due and idle:
            self._collect_due = False
            self.data.collect()
        if self.preload_checker and idle and self.checker.process is None and now - self._born > CHECKER_PRELOAD_AFTER_S:
            self.checker.start()

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
        self.checker.stop()

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

    def _owned_job(self, job_id: str, owner: str, hint: str = "check the job id") -> Job:
        job = self._job(job_id)
        if job is None or not owns(owner, job.row.source_key):
            raise ServiceError("unknown_job", f"no job {job_id!r} on this solver: {hint}")
        return job

    def _check_same_request(self, job: Job, body: dict, source: str) -> None:
        """A known job id may only be resent unchanged (a retry or a resume), never reused for another edit."""
        row = job.row
        stored = {k: v for k, v in row.params.items() if k not in SERVER_PARAM_KEYS}
        differs = [what for what, same in (
            ("task", body["task"] == row.task),
            ("parameters", json.dumps(body["params"], sort_keys=True) == json.dumps(stored, sort_keys=True)),
            ("object", source == row.source_key),
            ("parent node", body["parent_node"] == row.base_node),
            ("mesh", body["mesh_hash"] is None or row.mesh_hash is None or body["mesh_hash"] == row.mesh_hash),
        ) if not same]
        if differs:
            then = "was interrupted" if job.state == "interrupted" else f"is {job.state}"
            raise ServiceError("invalid_input", f"job {row.job_id} {then}, and this submit differs in its "
                                                f"{' and '.join(differs)}: a new edit needs a fresh job id; to "
                                                "run this job again, resubmit it unchanged")

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

    def _mesh_facts(self, blob: str) -> tuple[int, int, tuple, float]:
        """(vertices, faces, center, scale) of a stored mesh blob, remembered for the next submit."""
        facts = self._facts.get(blob)
        if facts is None:
            v, f, _ = unpack_mesh(self.blobs.read(blob, verify=False))
            facts = (len(v), len(f), *normalization_of(v, f))
            self._facts[blob] = facts
            while len(self._facts) > 64:
                self._facts.popitem(last=False)
        return facts

    def _echo_probe(self, msg: wire.Message, base_row, source: str, owner: str) -> dict:
        """The no-op task, answered at once: validate the mesh and keep it (in memory) as the result."""
        body = msg.body
        digests = None
        if "vertices" in msg.arrays or "faces" in msg.arrays:
            v, f, mesh_hash = self._checked_mesh(msg)
            digests = {k: msg.digests[k] for k in ("vertices", "faces")}
        elif body["mesh_hash"] is not None:
            mesh_hash = body["mesh_hash"]
            blob = self.store.mesh_blob(mesh_hash, owner and owner + SCOPE_SEP)
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
        row = JobRow(body["job_id"], source, "echo", body["params"], mesh_hash, body["parent_node"], "",
                     "done", None, None, now, 1)
        job = Job(row, "done", stage="done", fraction=1.0)
        self._remember(job)
        self.probes[row.job_id] = ({"vertices": v, "faces": f}, digests)
        while len(self.probes) > 8:
            self.probes.popitem(last=False)
        return job.as_reply()

    def _store_mesh(self, v, f, mesh_hash: str) -> None:
        if self.store.mesh_blob(mesh_hash) is None:
            blob = self.blobs.put_bytes(pack_mesh(v, f))  # durable before the row that names it
            self.store.add_mesh(mesh_hash, blob, len(v), len(f))

    def _input_blob(self, row: JobRow) -> str:
        if row.mesh_hash is not None:
            return self.store.mesh_blob(row.mesh_hash)
        return self.store.node(row.base_node).result_blob

    def _commit(self, job: Job, record: dict) -> None:
        input_hash = job.row.mesh_hash or self._input_blob(job.row)
        node_id = self.store.finish_job(job.row.job_id, dict(record, node_id=wire.new_id(), input_hash=input_hash))
        job.state, job.node_id, job.stage, job.fraction, job.error = "done", node_id, "done", 1.0, None
        job.warnings = list(record.get("warnings", []))
        self.data.fit()  # the new node may push the folder past its cap: cached fields go first

    def _set_final(self, job: Job, state: str, error: str | None) -> None:
        self.store.set_job_state(job.row.job_id, state, error)
        job.state, job.error = state, error
        if state in ("failed", "cancelled"):
            self.data.forget_upload(job.row.mesh_hash)
            self._collect_due = True  # a stopped worker may have left blobs nothing names

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
            # The field of the node's result, when the task kept one; else None: the worker refits from
            # the node's result mesh (the input's field would describe the shape before that edit).
            start_field = self.store.node(row.base_node).result_field_blob
        tmp = self.blobs.root / "tmp"
        tmp.mkdir(exist_ok=True, mode=0o700)
        job.log_path = tmp / f"job-{os.urandom(6).hex()}.log"
        spec = {"job_id": row.job_id, "task": row.task, "params": row.params, "input_blob": self._input_blob(row),
                "start_field_blob": start_field, "blob_root": str(self.blobs.root), "cache_root": str(self.cache_root),
                "cache_max_bytes": self.limits.cache_max_bytes, "memory_bytes": self.limits.memory_bytes,
                "cpu_seconds": self.limits.time_s * 4, "threads": self.limits.threads, "parent_pid": os.getpid(),
                "log_path": str(job.log_path)}
        parent, child = self._ctx.Pipe()
        with processes.spawn_guard():
            proc = self._ctx.Process(target=worker.main, args=(child, spec), daemon=True,
                                     name=f"isoclay-job-{row.job_id}")
            proc.start()
        child.close()
        job.process, job.conn, job.started, job.final, job.cancel_at = proc, parent, time.monotonic(), None, None
        job.evidence, job.oom_before, job.sampled = crashes.Evidence(), crashes.oom_kill_count(), 0.0
        job.state, job.stage, job.fraction = "running", "starting", 0.0
        self.store.set_job_state(row.job_id, "running", count_attempt=True)

    def _drain(self, job: Job) -> None:
        conn = job.conn
        try:
            while conn.poll(0):
                msg = conn.recv()
                if msg[0] == "started":
                    job.evidence.started = True
                elif msg[0] == "progress":
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
            after = crashes.oom_kill_count()
            ev = job.evidence
            ev.oom_kills = after - job.oom_before if after is not None and job.oom_before is not None else None
            ev.last_words = crashes.last_words(job.log_path) if job.log_path else ""
            self._set_final(job, "failed", crashes.crash_reason(job.process.exitcode, self.limits.memory_bytes, ev))
        if job.log_path is not None:
            job.log_path.unlink(missing_ok=True)
        job.process = None


def correspondence_of(mesh_blob) -> dict:
    """source_face / source_bary stored with a result mesh (see worker.correspondence_arrays), or {}."""
    return {k: a for k, a in unpack_arrays(mesh_blob, MESH_MAGIC).items() if k in ("source_face", "source_bary")}
