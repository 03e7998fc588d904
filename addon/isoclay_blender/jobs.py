"""Solver work that must not block Blender: an edit job and one-off requests, each on a helper thread.

No bpy here. The helper thread owns its own SolverClient (ZeroMQ sockets stay on one thread), does
all the waiting, and leaves a snapshot behind a lock; `poll()` only copies that snapshot, so the UI
thread never waits on the network. A modal operator calls `poll()` on a timer; tests call it directly.
"""

from __future__ import annotations

import threading
import time
import uuid
from dataclasses import dataclass, field, replace
from typing import Callable

import numpy as np

QUEUED, RUNNING, DONE, FAILED, CANCELLED, INTERRUPTED = "queued", "running", "done", "failed", "cancelled", "interrupted"
STARTING = "starting"  # local to the add-on: submission not acknowledged yet
TERMINAL = (DONE, FAILED, CANCELLED, INTERRUPTED)


@dataclass(frozen=True)
class JobSnapshot:
    """What the UI shows about a job. fraction in [0, 1]; error is one line, empty unless failed."""

    state: str = STARTING
    stage: str = ""
    fraction: float = 0.0
    info: dict = field(default_factory=dict)
    error: str = ""
    node_id: str = ""
    seconds: float = 0.0

    @property
    def finished(self) -> bool:
        return self.state in TERMINAL


def new_job_id() -> str:
    return uuid.uuid4().hex


def explain(exc: BaseException, client_module, task: str = "edit") -> str:
    """One line for the artist: what went wrong and what to do."""
    from .messages import for_artist
    from .solver_process import SolverSetupError

    if isinstance(exc, SolverSetupError):
        return str(exc)
    if isinstance(exc, client_module.KeyRejected):
        return f"the solver refused the add-on's key ({exc}): restart the solver or pick its current connection file"
    if isinstance(exc, client_module.SolverUnreachable):
        return f"the solver stopped answering ({exc}): restart it from the add-on preferences, then run the edit again"
    if isinstance(exc, client_module.RemoteError):
        return for_artist(str(exc), task)
    if isinstance(exc, client_module.ClientError):
        return str(exc) or type(exc).__name__
    return f"unexpected {type(exc).__name__}: {exc}"


class EditJob:
    """One edit (deform, smooth, sharpen, ...) from submission to fetched result.

    connect : callable returning a SolverClient; called on the helper thread
    client_module : the module providing ClientError, SolverUnreachable, KeyRejected
    vertices : (n, 3) float64 world units; faces : (m, 3) int; both None to start from parent_node's result
    params : task parameters (world units), sent as is
    parent_node : history node to start from (no refit), or None
    solver_gone : optional callable returning why the solver is known to be dead ("" while it
        lives), so a crashed local solver is reported at once instead of after the client's timeouts
    arrays : more array frames for the request, e.g. {"handles:<i>": (k, 3) float64} of a deform's groups
    """

    def __init__(self, connect: Callable, client_module, task: str, params: dict, vertices: np.ndarray,
                 faces: np.ndarray, source_key: str, parent_node: str | None = None,
                 job_id: str | None = None, poll_interval_s: float = 0.1,
                 solver_gone: Callable[[], str] | None = None, arrays: dict | None = None):
        self.connect = connect
        self.client_module = client_module
        self.task = task
        self.params = dict(params)
        self.vertices = None if vertices is None else np.ascontiguousarray(vertices, dtype=np.float64)
        self.faces = None if faces is None else np.ascontiguousarray(faces, dtype=np.int64)
        self.source_key = source_key
        self.parent_node = parent_node
        self.job_id = job_id or new_job_id()
        self.poll_interval_s = poll_interval_s
        self.solver_gone = solver_gone
        self.arrays = dict(arrays or {})
        self.record: dict | None = None
        self.max_poll_block_s = 0.0
        self._snapshot = JobSnapshot()
        self._lock = threading.Lock()
        self._cancel = threading.Event()
        self._thread: threading.Thread | None = None
        self._t0 = 0.0

    # called on the UI thread -------------------------------------------------------------------
    def start(self) -> "EditJob":
        self._t0 = time.monotonic()
        self._thread = threading.Thread(target=self._run, name=f"isoclay-job-{self.job_id[:8]}", daemon=True)
        self._thread.start()
        return self

    def poll(self) -> JobSnapshot:
        """The latest state, without waiting on anything but a lock held for microseconds."""
        t = time.perf_counter()
        with self._lock:
            snap = self._snapshot
        if not snap.finished:
            snap = replace(snap, seconds=time.monotonic() - self._t0)
        self.max_poll_block_s = max(self.max_poll_block_s, time.perf_counter() - t)
        return snap

    def cancel(self) -> None:
        """Ask the solver to stop; the state turns `cancelled` when it has."""
        self._cancel.set()

    @property
    def cancel_requested(self) -> bool:
        return self._cancel.is_set()

    def wait(self, timeout_s: float = 600.0, interval_s: float = 0.05) -> JobSnapshot:
        """Poll until finished (scripts and tests; the UI polls from a timer instead)."""
        deadline = time.monotonic() + timeout_s
        snap = self.poll()
        while not snap.finished and time.monotonic() < deadline:
            time.sleep(interval_s)
            snap = self.poll()
        return snap

    def join(self, timeout_s: float = 5.0) -> None:
        if self._thread is not None:
            self._thread.join(timeout_s)

    # helper thread ------------------------------------------------------------------------------
    def _update(self, **changes) -> None:
        with self._lock:
            self._snapshot = replace(self._snapshot, **changes, seconds=time.monotonic() - self._t0)

    def _run(self) -> None:
        mod = self.client_module
        client = None
        try:
            client = self.connect()
            client.submit(self.job_id, self.task, self.params, self.vertices, self.faces,
                          self.source_key, parent_node=self.parent_node, arrays=self.arrays or None)
            self._update(state=QUEUED, stage="queued")
            cancel_sent = False
            while True:
                gone = self.solver_gone() if self.solver_gone else ""
                if gone:
                    self._update(state=FAILED, error=f"{gone}: restart it from the add-on preferences, then run the edit again")
                    return
                if self._cancel.is_set() and not cancel_sent:
                    client.cancel(self.job_id)
                    cancel_sent = True
                status = client.poll(self.job_id)
                state = status.get("state", RUNNING)
                self._update(state=state if state != DONE else RUNNING, stage=status.get("stage") or state,
                             fraction=float(status.get("fraction") or 0.0), info=dict(status.get("info") or {}))
                if state in TERMINAL:
                    break
                if cancel_sent:
                    time.sleep(self.poll_interval_s)
                else:
                    self._cancel.wait(self.poll_interval_s)  # a cancel wakes the loop at once
            if state == DONE:
                self._update(stage="downloading", fraction=1.0)
                self.record = client.result(self.job_id)
                node = self.record.get("node_id") if isinstance(self.record, dict) else getattr(self.record, "node_id", "")
                self._update(state=DONE, stage="done", node_id=str(node or status.get("node_id") or ""))
            elif state == CANCELLED:
                self._update(state=CANCELLED, stage="cancelled", error="")
            elif state == INTERRUPTED:
                self._update(state=INTERRUPTED, error="the solver restarted during this edit: run the edit again")
            else:
                from .messages import for_artist

                self._update(state=FAILED, error=for_artist(status.get("error") or "", self.task))
        except Exception as exc:  # every failure becomes a one-line report for the artist
            self._update(state=FAILED, error=explain(exc, mod, self.task))
        finally:
            _close_quietly(client)


def _close_quietly(client) -> None:
    """Close a client after a call; a failure to close must not hide the call's own outcome."""
    if client is not None:
        try:
            client.close()
        except Exception:
            pass


class Request:
    """A single client call (history, fetch_node, ...) on a helper thread; poll() never waits."""

    def __init__(self, connect: Callable, client_module, call: Callable):
        self.connect = connect
        self.client_module = client_module
        self.call = call
        self.value = None
        self.error = ""
        self.done = False
        self._thread: threading.Thread | None = None

    def start(self) -> "Request":
        self._thread = threading.Thread(target=self._run, name="isoclay-request", daemon=True)
        self._thread.start()
        return self

    def _run(self) -> None:
        client = None
        try:
            client = self.connect()
            self.value = self.call(client)
        except Exception as exc:
            self.error = explain(exc, self.client_module)
        finally:
            _close_quietly(client)
            self.done = True

    def poll(self) -> bool:
        return self.done

    def wait(self, timeout_s: float = 60.0):
        if self._thread is not None:
            self._thread.join(timeout_s)
        return self.value
