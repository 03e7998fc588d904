"""Submit-time parameter checks: each task's Config.from_params and FitConfig.validated, in a helper process.

The task modules import torch and the server process never does, so a helper process (spawned
like a job worker, with the same limits and no working folder on its path) imports them once
and answers "would this edit be accepted?" over a pipe in about a millisecond. The server asks
before it stores an upload or queues the job, so an out-of-range value comes back as the
submit's one-line refusal with nothing left behind. While the helper is still loading (the
first seconds after the solver starts) a job is queued unchecked and its worker refuses it with
the same message.
"""

from __future__ import annotations

import itertools
import multiprocessing
import os
import time

from ..errors import InvalidInput, InvalidMesh, IsoclayError
from . import processes

#: One check parses a few parameters (milliseconds, ~50 ms for 10,000 listed handle points);
#: a helper silent for this long is stuck on the input and is restarted.
CHECK_TIMEOUT_S = 3.0


def fit_config_of(params: dict, seed: int = 0):
    """(FitConfig validated, task parameters without "fit") from an edit's parameters; InvalidInput if bad."""
    from ..field.fit import FitConfig

    params = dict(params)
    settings = params.pop("fit", None) or {}
    if not isinstance(settings, dict):
        raise InvalidInput("params.fit must be a map of fit settings (resolution, steps, ...)")
    try:
        config = FitConfig(**{"seed": seed, **settings})
    except TypeError as exc:
        raise InvalidInput(f"unknown fit setting in params.fit ({exc}): see FitConfig's fields") from None
    return config.validated(), params


def check_edit(task: str, params: dict, center, scale) -> None:
    """Raise what the worker would raise for these parameters, before any mesh work.

    center, scale : the mesh's normalization (mesh.Normalization), from its bounding box
    """
    from ..mesh.normalize import Normalization
    from ..tasks.registry import task_module

    _, task_params = fit_config_of(params)
    task_module(task).Config.from_params(task_params, Normalization(tuple(center), float(scale)))


def _checker_main(conn, memory_bytes) -> None:
    from .worker import prepare_process

    prepare_process(memory_bytes, None)
    try:
        os.nice(10)  # loading torch here must not slow the jobs running beside it
    except (AttributeError, OSError):
        pass
    import importlib

    from ..tasks.registry import TASK_MODULES

    for module in TASK_MODULES.values():  # pay every import once, before the first question
        try:
            importlib.import_module(module)
        except ImportError:
            pass
    conn.send(("ready",))
    while True:
        try:
            request_id, task, params, center, scale = conn.recv()
        except (EOFError, OSError):
            return
        try:
            check_edit(task, params, center, scale)
            verdict = None
        except IsoclayError as exc:
            verdict = ("invalid_mesh" if isinstance(exc, InvalidMesh) else "invalid_input", _one_line(exc))
        except Exception as exc:  # a parser that breaks on odd input: still one line, still a refusal
            verdict = ("invalid_input", f"{task} parameters could not be read ({type(exc).__name__}: {_one_line(exc)})")
        conn.send((request_id, verdict))


def _one_line(exc) -> str:
    return " ".join(str(exc).split())[:400]


class ParamChecker:
    """The helper process; used from the server's message loop only (one thread)."""

    def __init__(self, memory_bytes: int):
        self.memory_bytes = memory_bytes
        self._ctx = multiprocessing.get_context("spawn")
        self.process = None
        self.conn = None
        self._ready = False
        self._ids = itertools.count(1)
        self.stats = {"checked": 0, "refused": 0, "unchecked": 0, "restarts": 0}

    def start(self) -> None:
        """Start the helper unless it runs (returns at once; it is ready a few seconds later)."""
        if self.process is not None and self.process.is_alive():
            return
        self._ready = False
        parent, child = self._ctx.Pipe()
        with processes.spawn_guard():
            proc = self._ctx.Process(target=_checker_main, args=(child, self.memory_bytes), daemon=True,
                                     name="isoclay-param-check")
            proc.start()
        child.close()
        self.process, self.conn = proc, parent

    def ready(self) -> bool:
        """True once the helper has loaded the task modules (never blocks)."""
        if not self._ready and self.conn is not None:
            try:
                if self.conn.poll(0) and self.conn.recv() == ("ready",):
                    self._ready = True
            except (EOFError, OSError):
                self._restart()
        return self._ready

    def wait_ready(self, timeout_s: float) -> bool:
        self.start()
        deadline = time.monotonic() + timeout_s
        while not self.ready() and time.monotonic() < deadline:
            time.sleep(0.02)
        return self._ready

    def check(self, task: str, params: dict, center, scale) -> tuple[str, str] | None:
        """None if the edit's parameters are accepted (or the helper is still loading), else (code, one line)."""
        self.start()
        if not self.ready():
            self.stats["unchecked"] += 1
            return None
        request_id = next(self._ids)
        try:
            self.conn.send((request_id, task, params, tuple(center), float(scale)))
            deadline = time.monotonic() + CHECK_TIMEOUT_S
            while True:
                left = deadline - time.monotonic()
                if left <= 0 or not self.conn.poll(left):
                    self._restart()
                    return "invalid_input", (f"checking the {task} parameters took over {CHECK_TIMEOUT_S:g} s: "
                                             "give fewer handle points or simpler parameters")
                answer_id, verdict = self.conn.recv()
                if answer_id == request_id:
                    break
        except (EOFError, OSError, BrokenPipeError):
            self._restart()
            return "invalid_input", (f"the {task} parameters could not be checked (the checking process stopped): "
                                     "give fewer handle points or simpler parameters")
        self.stats["checked"] += 1
        self.stats["refused"] += verdict is not None
        return verdict

    def _restart(self) -> None:
        self.stop()
        self.stats["restarts"] += 1
        self.start()

    def stop(self) -> None:
        proc, self.process = self.process, None
        if self.conn is not None:
            self.conn.close()
            self.conn = None
        if proc is not None:
            proc.kill()
            proc.join(timeout=2.0)
        self._ready = False
