"""Why a worker died without reporting: the evidence the server gathers and the one line it tells the artist.

A SIGKILL has many senders: the kernel's out-of-memory killer, an administrator, a supervisor,
another program. The server blames memory only when there is evidence: the kernel's OOM-kill
counter (the cgroup's, else the machine's) went up while the job ran, or the worker's peak
resident memory came close to its limit. Otherwise it says the worker was killed from outside.
"""

from __future__ import annotations

import os
import signal
from dataclasses import dataclass
from pathlib import Path

from ..bounds import shown_bytes

#: A peak resident size at or above this fraction of the memory limit counts as memory pressure.
NEAR_LIMIT = 0.9


@dataclass
class Evidence:
    """What the server knows about a worker (collected while it ran and when it ended).

    started : the worker reached its own code (it sent "started")
    peak_rss : highest resident size seen (bytes, from /proc), or None where unknown
    oom_kills : kernel OOM kills counted while the job ran, or None where unknown
    last_words : the last meaningful line the worker wrote to its log ("" if none)
    """

    started: bool = False
    peak_rss: int | None = None
    oom_kills: int | None = None
    last_words: str = ""


def oom_kill_count() -> int | None:
    """The kernel's count of out-of-memory kills for this process's cgroup (v2 or v1), else the machine's."""
    candidates = []
    try:
        for line in Path("/proc/self/cgroup").read_text().splitlines():
            _, controllers, path = line.split(":", 2)
            path = path.lstrip("/")
            if controllers == "":
                candidates += [Path("/sys/fs/cgroup") / path / "memory.events"]
            elif "memory" in controllers.split(","):
                candidates += [Path("/sys/fs/cgroup/memory") / path / "memory.oom_control"]
    except (OSError, ValueError):
        pass
    candidates += [Path("/sys/fs/cgroup/memory.events"), Path("/sys/fs/cgroup/memory/memory.oom_control"),
                   Path("/proc/vmstat")]
    for path in candidates:
        try:
            for line in path.read_text().splitlines():
                name, _, value = line.partition(" ")
                if name == "oom_kill":
                    return int(value)
        except (OSError, ValueError):
            continue
    return None


def peak_rss(pid: int) -> int | None:
    """Peak resident set size of a live process (VmHWM, Linux), bytes; None where unknown."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def last_words(log_path, limit: int = 200) -> str:
    """The line of a worker's log that says most about its end: a fatal error line, else the last line."""
    try:
        with open(log_path, "rb") as handle:
            handle.seek(max(0, os.fstat(handle.fileno()).st_size - 16384))
            lines = [ln.strip() for ln in handle.read().decode("utf-8", "replace").splitlines() if ln.strip()]
    except OSError:
        return ""
    fatal = [ln for ln in lines if ln.startswith(("Fatal Python error", "Traceback", "MemoryError"))]
    chosen = fatal[-1] if fatal and fatal[-1].startswith("Fatal") else (lines[-1] if lines else "")
    if chosen.startswith("Traceback") and lines:
        chosen = lines[-1]
    return chosen[:limit]


def crash_reason(exitcode, memory_limit: int, evidence: Evidence | None = None) -> str:
    """One line explaining how a worker died without reporting."""
    ev = evidence or Evidence()
    words = f" (its last output: {ev.last_words})" if ev.last_words else ""
    if not ev.started:
        return (f"the worker could not start (exit code {exitcode}){words}: the solver's Python environment may be "
                "broken; see the solver's log")
    if exitcode is not None and exitcode < 0:
        try:
            name = signal.Signals(-exitcode).name
        except ValueError:
            name = f"signal {-exitcode}"
        if name == "SIGXCPU":
            return "the worker hit the solver's CPU-time limit: lower the resolution or raise --time-limit"
        if name == "SIGKILL":
            return _killed(memory_limit, ev)
        return f"the worker crashed ({name}){words}: the server keeps serving; retry, and report it if it repeats"
    return f"the worker exited unexpectedly (exit code {exitcode}){words}: retry, and report it if it repeats"


def _killed(memory_limit: int, ev: Evidence) -> str:
    fix = "decimate the mesh, lower params.fit.resolution, or run fewer jobs at once"
    if ev.oom_kills:
        return f"the machine ran out of memory and the kernel stopped the worker (SIGKILL): {fix}"
    if ev.peak_rss is not None and ev.peak_rss >= NEAR_LIMIT * memory_limit:
        return (f"the worker was killed (SIGKILL) while using {shown_bytes(ev.peak_rss)} of its "
                f"{shown_bytes(memory_limit)} limit, most likely for memory: {fix}")
    if ev.peak_rss is not None and ev.oom_kills is not None:
        return (f"the worker was killed (SIGKILL) by another process or an administrator, not for lack of memory "
                f"(peak {shown_bytes(ev.peak_rss)} of {shown_bytes(memory_limit)} allowed, no out-of-memory kill "
                "recorded): submit it again, and check what stops processes on the solver's machine")
    return ("the worker was killed (SIGKILL); the solver cannot tell by what (out of memory, or another process): "
            f"submit it again; if it repeats, {fix}")
