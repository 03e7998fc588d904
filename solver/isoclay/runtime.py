"""Process-wide settings for shared CPUs: thread counts (torch's and numba's), passive waiting, no denormals."""

from __future__ import annotations

import os

_configured = False


def free_cores() -> int:
    """Cores this process may use, leaving one for Blender when more than two exist."""
    try:
        n = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - macOS/Windows
        n = os.cpu_count() or 1
    return max(1, n - 1) if n > 2 else n


def _threads(threads: int | None) -> int:
    if threads is None:
        env = os.environ.get("ISOCLAY_THREADS")
        threads = int(env) if env else free_cores()
    return max(1, threads)


def configure_threads(threads: int | None = None) -> None:
    """Set numba's threads only (the compiled distance and evaluation kernels), for work that
    never imports torch (a command-line rebuild)."""
    import numba

    numba.set_num_threads(max(1, min(_threads(threads), numba.config.NUMBA_NUM_THREADS)))


def configure_torch(threads: int | None = None) -> None:
    """Set threads (torch's and numba's) and flush denormals once per process (see FACTS: denormal slowdowns).

    OMP_WAIT_POLICY must be set before torch starts its OpenMP pool, so it is set here
    only if the caller has not; the CLI entry point calls this before heavy work.
    """
    global _configured
    os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
    import torch

    threads = _threads(threads)
    torch.set_num_threads(threads)
    torch.set_flush_denormal(True)
    configure_threads(threads)  # the compiled kernels run on as many threads as torch
    _configured = True


def device():
    """The torch device to use: CUDA when present, else CPU."""
    import torch

    if os.environ.get("ISOCLAY_DEVICE"):
        return torch.device(os.environ["ISOCLAY_DEVICE"])
    return torch.device("cuda" if torch.cuda.is_available() else "cpu")
