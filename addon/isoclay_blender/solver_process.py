"""The solver the add-on talks to: a local `isoclay serve` process or a shared one, and its status.

No bpy here: the add-on's UI reads `SolverLink.status` and calls `tick()` from a timer; tests call
the same methods directly (timers never fire in a headless Blender).

The local solver is started with its standard input as a pipe that nothing writes to. When Blender
exits, or dies, the pipe closes and the solver ends by itself; the add-on also stops it explicitly
on unregister and at interpreter exit.
"""

from __future__ import annotations

import atexit
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time

NOT_CONFIGURED = "not configured"
STARTING = "starting"
CONNECTED = "connected"
UNREACHABLE = "unreachable"
KEY_REJECTED = "key rejected"
STOPPED = "stopped unexpectedly"
STATUSES = (NOT_CONFIGURED, STARTING, CONNECTED, UNREACHABLE, KEY_REJECTED, STOPPED)


def exit_reason(code: int | None) -> str:
    """A few words on how a process ended, from its exit code (negative: the signal that ended it)."""
    if code is None:
        return "still running"
    if code < 0:
        import signal

        try:
            name = signal.Signals(-code).name
        except ValueError:
            name = f"signal {-code}"
        if name == "SIGKILL":
            return "killed (SIGKILL: ended from outside, or the system ran out of memory)"
        if name == "SIGTERM":
            return "asked to stop (SIGTERM) by something other than the add-on"
        return f"ended by {name}"
    return f"exited with code {code}"


class SolverSetupError(Exception):
    """The solver cannot be started or reached with the current preferences; the message says why."""


def _log_tail(path: str, lines: int = 3) -> str:
    try:
        with open(path, "r", encoding="utf-8", errors="replace") as f:
            text = f.read()[-4000:]
    except OSError:
        return ""
    kept = [line.strip() for line in text.splitlines() if line.strip()]
    return " | ".join(kept[-lines:])


# Runs `isoclay serve` in the solver's interpreter, plus a watch on standard input: when Blender
# goes away (even killed) the pipe closes and the solver is asked to stop (SIGTERM, which the
# server handles by finishing cleanly). Kept here so the guarantee does not depend on the
# server's own version.
BOOTSTRAP = """
import os, signal, sys, threading
def _watch_stdin():
    try:
        while sys.stdin.buffer.read(65536):
            pass
    except (OSError, ValueError):
        pass
    if os.name == "posix":
        os.kill(os.getpid(), signal.SIGTERM)
    else:
        os._exit(0)
threading.Thread(target=_watch_stdin, name="isoclay-stdin-watch", daemon=True).start()
from isoclay.cli import main
sys.exit(main(sys.argv[1:]))
"""


class LocalSolver:
    """One `isoclay serve` child process with a private connection file.

    python : path of the solver environment's interpreter
    module_path : optional folder put on the child's PYTHONPATH (a source checkout's `solver/`)
    data_dir : optional folder for the solver's edit history and caches (else the solver's default)
    extra_args : more `isoclay serve` options
    """

    def __init__(self, python: str, module_path: str = "", data_dir: str = "", extra_args: tuple = ()):
        self.python = python
        self.module_path = module_path
        self.data_dir = data_dir
        self.extra_args = tuple(extra_args)
        self.folder = ""
        self.connection_file = ""
        self.log_file = ""
        self.process: subprocess.Popen | None = None
        self.was_ready = False

    def command(self) -> list[str]:
        cmd = [self.python, "-c", BOOTSTRAP, "serve", "--connection-file", self.connection_file]
        if self.data_dir:
            cmd += ["--data-dir", self.data_dir]
        return cmd + list(self.extra_args)

    def start(self) -> None:
        """Launch the process; returns at once (the connection file appears when it is ready)."""
        if not self.python:
            raise SolverSetupError("no solver Python set: point the add-on preferences at the solver environment's interpreter")
        if not (os.path.isfile(self.python) and os.access(self.python, os.X_OK)):
            raise SolverSetupError(f"solver Python {self.python!r} is not an executable file: fix the path in the add-on preferences")
        if self.module_path and not os.path.isdir(self.module_path):
            raise SolverSetupError(f"solver module folder {self.module_path!r} does not exist: fix or clear it in the add-on preferences")
        self.folder = tempfile.mkdtemp(prefix="isoclay-blender-")  # mode 0700
        self.connection_file = os.path.join(self.folder, "connection.json")
        self.log_file = os.path.join(self.folder, "solver.log")
        env = dict(os.environ)
        env.pop("PYTHONHOME", None)  # Blender's own Python home must not leak into the solver's
        env.pop("PYTHONPATH", None)
        if self.module_path:
            env["PYTHONPATH"] = self.module_path
        env.setdefault("PYTHONUNBUFFERED", "1")
        env["PYTHONSAFEPATH"] = "1"  # the working folder never shadows the solver's modules (Python 3.11+, as -P)
        log = open(self.log_file, "wb")
        kwargs = {}
        if sys.platform == "win32":
            kwargs["creationflags"] = getattr(subprocess, "CREATE_NO_WINDOW", 0)
        try:
            self.process = subprocess.Popen(
                self.command(), stdin=subprocess.PIPE, stdout=log, stderr=subprocess.STDOUT,
                env=env, cwd=self.folder, close_fds=True, **kwargs,
            )
        except OSError as exc:
            raise SolverSetupError(f"could not start the solver ({exc}): check the solver Python path in the preferences") from exc
        finally:
            log.close()

    @property
    def pid(self) -> int | None:
        return self.process.pid if self.process else None

    def exit_code(self) -> int | None:
        """None while running (or never started), else the process's exit code."""
        return self.process.poll() if self.process else None

    def ready(self) -> bool:
        """True once the connection file is complete JSON (the server writes it when it listens)."""
        try:
            with open(self.connection_file, "r", encoding="utf-8") as f:
                json.load(f)
            self.was_ready = True
            return True
        except (OSError, ValueError):
            return False

    def failure_message(self) -> str:
        """Why the process is gone, in one line; a solver that never came up points at the preferences."""
        code = self.exit_code()
        tail = _log_tail(self.log_file)
        if self.was_ready:
            return f"the local solver stopped unexpectedly: {exit_reason(code)}" + (f" (log: {tail})" if tail and code and code > 0 else "")
        return (f"the local solver {exit_reason(code)} while starting" + (f": {tail}" if tail else "")
                + "; check the solver Python path in the add-on preferences")

    def stop(self, grace_s: float = 2.0) -> None:
        """Close stdin (the solver's cue to exit), then terminate, then kill; remove the folder."""
        process, self.process = self.process, None
        if process is not None:
            try:
                if process.stdin:
                    process.stdin.close()
            except OSError:
                pass
            for escalate in (None, process.terminate, process.kill):
                if escalate is not None:
                    try:
                        escalate()
                    except OSError:
                        pass
                try:
                    process.wait(timeout=grace_s)
                    break
                except subprocess.TimeoutExpired:
                    continue
        if self.folder:
            shutil.rmtree(self.folder, ignore_errors=True)
            self.folder = ""


class SolverLink:
    """What the add-on is connected to and how that is going.

    Configure with `use_local(python, module_path)` or `use_shared(connection_file)`; `tick()`
    advances the state without blocking (a ping runs on a helper thread); `status` is one of
    STATUSES and `detail` a one-line explanation for the panel.
    """

    def __init__(self, client_module=None, ping_timeout_s: float = 2.0):
        self._client_module = client_module
        self.ping_timeout_s = ping_timeout_s
        self.local: LocalSolver | None = None
        self.shared_file = ""
        self.status = NOT_CONFIGURED
        self.detail = "set the solver in the add-on preferences"
        self.boot_id = ""
        self.version = ""
        self._lock = threading.Lock()
        self._ping_thread: threading.Thread | None = None
        self._last_ping = 0.0
        self.ping_every_s = 5.0

    # configuration -------------------------------------------------------------------------
    def client_module(self):
        if self._client_module is None:
            from . import client  # copied from solver/isoclay/client.py by addon/build.py

            self._client_module = client
        return self._client_module

    def use_local(self, python: str, module_path: str = "", data_dir: str = "", extra_args: tuple = ()) -> None:
        """Start a local solver (stopping any previous one); raises SolverSetupError."""
        self.stop()
        solver = LocalSolver(python, module_path, data_dir, extra_args)
        try:
            solver.start()
        except SolverSetupError as exc:
            self._set(NOT_CONFIGURED, str(exc))
            raise
        self.local = solver
        self._set(STARTING, f"solver process {solver.pid} starting")

    def restart(self) -> None:
        """Start the local solver again with the settings it last ran with (it died); raises SolverSetupError."""
        old = self.local
        self.use_local(old.python, old.module_path, old.data_dir, old.extra_args)

    def use_shared(self, connection_file: str) -> None:
        """Use a solver someone else started, described by its connection file."""
        self.stop()
        path = os.path.abspath(os.path.expanduser(connection_file)) if connection_file else ""
        if not path or not os.path.isfile(path):
            self._set(NOT_CONFIGURED, f"connection file {connection_file!r} not found: choose the file the shared solver wrote")
            raise SolverSetupError(self.detail)
        self.shared_file = path
        self._set(STARTING, "contacting the shared solver")
        self._start_ping()

    def stop(self) -> None:
        """Stop a local solver (if any) and forget the connection."""
        if self.local is not None:
            self.local.stop()
            self.local = None
        self.shared_file = ""
        self.boot_id = ""
        self._set(NOT_CONFIGURED, "no solver in use")

    def connection_file(self) -> str:
        if self.local is not None:
            return self.local.connection_file
        return self.shared_file

    def configured(self) -> bool:
        return self.local is not None or bool(self.shared_file)

    def died(self) -> bool:
        """True when the local solver this link started has exited without being stopped."""
        return self.local is not None and self.local.exit_code() is not None

    # state ----------------------------------------------------------------------------------
    def _set(self, status: str, detail: str) -> None:
        with self._lock:
            self.status, self.detail = status, detail

    def tick(self) -> str:
        """Advance the state machine without blocking; returns the status."""
        if self.local is not None:
            if self.local.exit_code() is not None:
                self._set(STOPPED if self.local.was_ready else UNREACHABLE, self.local.failure_message())
                return self.status
            if not self.local.ready():
                return self.status
        elif not self.shared_file:
            return self.status
        if self._ping_thread is None and (self.status == STARTING or time.monotonic() - self._last_ping > self.ping_every_s):
            self._start_ping()
        return self.status

    def wait_ready(self, timeout_s: float = 30.0) -> str:
        """Block until the first ping has an answer or the process died (scripts and tests; the UI uses tick())."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            self.tick()
            thread = self._ping_thread
            if thread is not None:
                thread.join(timeout=max(0.0, deadline - time.monotonic()))
                if not thread.is_alive() and self.status != STARTING:
                    return self.status
            elif self.status != STARTING:
                return self.status
            time.sleep(0.05)
        if self.status == STARTING:
            self._set(UNREACHABLE, f"the solver did not answer within {timeout_s:.0f} s; see its log")
        return self.status

    def _start_ping(self) -> None:
        self._last_ping = time.monotonic()
        thread = threading.Thread(target=self._ping, name="isoclay-ping", daemon=True)
        self._ping_thread = thread
        thread.start()

    def _ping(self) -> None:
        mod = self.client_module()
        try:
            client = mod.SolverClient(self.connection_file(), timeout_s=self.ping_timeout_s, retries=1)
            try:
                info = client.ping()
            finally:
                client.close()
            restarted = self.boot_id and info.get("boot_id") != self.boot_id
            self.boot_id = str(info.get("boot_id", ""))
            self.version = str(info.get("version", ""))
            note = " (it restarted since the last check)" if restarted else ""
            self._set(CONNECTED, f"solver {self.version}, protocol {info.get('protocol')}{note}")
        except mod.KeyRejected as exc:
            self._set(KEY_REJECTED, f"the solver refused the key ({exc}): use its current connection file")
        except mod.SolverUnreachable as exc:
            self._set(UNREACHABLE, f"no answer from the solver ({exc}): start it or check the connection file")
        except Exception as exc:  # a bad connection file or protocol mismatch: show, do not crash the UI
            self._set(UNREACHABLE, f"cannot talk to the solver: {exc}")
        finally:
            self._ping_thread = None

    def make_client(self, timeout_s: float = 5.0, retries: int = 3):
        """A new SolverClient for the current connection (the caller closes it)."""
        if not self.configured():
            raise SolverSetupError("no solver configured: set one in the add-on preferences and start it")
        if self.local is not None and self.local.exit_code() is not None:
            raise SolverSetupError(self.local.failure_message())
        return self.client_module().SolverClient(self.connection_file(), timeout_s=timeout_s, retries=retries)


LINK = SolverLink()
atexit.register(LINK.stop)
