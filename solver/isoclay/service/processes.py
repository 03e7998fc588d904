"""How the solver starts processes so that the working folder is never on their import path.

`python -m` and `python -c` put the current folder first on sys.path unless Python runs with -P
(3.11+, the same as PYTHONSAFEPATH=1) or -I: a `resource.py` or `json.py` left in the folder an
artist started from would run inside the solver. Everything the solver starts goes through
here: the re-execution of `isoclay serve` (``reexec_server``), and the job workers and the
parameter checker, which multiprocessing spawns with the parent's sys.path and a `python -c`
bootstrap (``spawn_guard``). `python -m isoclay.service.server` started without -P restarts
itself with it before importing anything (see the top of service/server.py).

-I is not used: it also drops PYTHONPATH, which source checkouts and the add-on's launcher rely on.
"""

from __future__ import annotations

import os
import sys
from contextlib import contextmanager
from pathlib import Path

#: Set for every child: Python 3.11+ then never puts the working folder on sys.path.
SAFE_ENV = {"PYTHONSAFEPATH": "1"}


def package_root() -> str:
    """The folder holding the isoclay package (a source checkout's solver/ or site-packages)."""
    return str(Path(__file__).resolve().parents[2])


def working_folder_entries(path: list[str] | None = None) -> list[str]:
    """The entries of ``path`` (default sys.path) that name the working folder ('' included),
    unless the working folder is the one holding isoclay itself."""
    cwd = os.path.abspath(os.getcwd())
    if cwd == os.path.abspath(package_root()):
        return []
    return [entry for entry in (sys.path if path is None else path) if os.path.abspath(entry or cwd) == cwd]


def safe_environment(base: dict | None = None) -> dict:
    """``base`` (default os.environ) with PYTHONSAFEPATH=1 and the package root first on PYTHONPATH.

    Empty and relative PYTHONPATH entries are dropped: Python reads them as the working folder.
    """
    env = dict(os.environ if base is None else base, **SAFE_ENV)
    root = package_root()
    parts = [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if os.path.isabs(p) and p != root]
    env["PYTHONPATH"] = os.pathsep.join([root, *parts])
    return env


def python_command(module: str, args) -> list[str]:
    """`python -P -m module args...` with this interpreter."""
    return [sys.executable, "-P", "-m", module, *args]


@contextmanager
def spawn_guard():
    """Wrap multiprocessing's ``Process.start()`` (spawn): the child inherits PYTHONSAFEPATH=1, so its
    `python -c` bootstrap leaves the working folder out, and receives a sys.path without it
    (spawn copies the parent's sys.path into the child before importing anything there).
    Call from the thread that starts processes; sys.path and the environment are restored after."""
    saved_env = os.environ.get("PYTHONSAFEPATH")
    saved_path = list(sys.path)
    os.environ.update(SAFE_ENV)
    unsafe = set(working_folder_entries())
    sys.path[:] = [p for p in sys.path if p not in unsafe]
    try:
        yield
    finally:
        sys.path[:] = saved_path
        if saved_env is None:
            os.environ.pop("PYTHONSAFEPATH", None)
        else:
            os.environ["PYTHONSAFEPATH"] = saved_env


def drop_working_folder() -> None:
    """Remove the working folder from this process's sys.path for good (a server process's start)."""
    unsafe = set(working_folder_entries())
    sys.path[:] = [p for p in sys.path if p not in unsafe]
    os.environ.update(SAFE_ENV)


def reexec_server(args) -> None:
    """Replace this process by `python -P -m isoclay.service.server args...` (same pid on POSIX)."""
    env = safe_environment()
    env["ISOCLAY_SERVE_CLEAN"] = "1"
    sys.stdout.flush()
    sys.stderr.flush()
    os.execve(sys.executable, python_command("isoclay.service.server", args), env)
