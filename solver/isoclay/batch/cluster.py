"""The Dask cluster a batch runs on: a LocalCluster by default, or a studio's running scheduler.

Local workers: one process per free core (isoclay.runtime.free_cores), one thread each, so an
item owns its core; OMP_WAIT_POLICY=PASSIVE and the torch thread count are put in the
environment before the worker processes are spawned (OpenMP reads its wait policy once, when
torch loads; FACTS.md: busy-waiting threads on a shared CPU made steps up to 10x slower). Every
worker, local or remote, also gets WorkerSetup, which applies the same settings in the worker
process before its first item and loads the solver so the first item is not charged for it.
"""

from __future__ import annotations

import contextlib
import importlib.util
import logging
import os
from dataclasses import dataclass

from ..errors import InvalidInput
from ..runtime import free_cores

try:
    from distributed.diagnostics.plugin import WorkerPlugin
except ImportError:  # pragma: no cover - dask is a dependency; a clear message comes from connect()
    WorkerPlugin = object


class WorkerSetup(WorkerPlugin):
    """Torch threads, passive OpenMP waiting and flushed denormals in each worker process."""

    name = "isoclay-worker-setup"

    def __init__(self, torch_threads: int = 1):
        self.torch_threads = int(torch_threads)

    def setup(self, worker):
        os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")  # effective while torch is not loaded yet
        threads = int(os.environ.get("ISOCLAY_THREADS") or self.torch_threads)
        from ..runtime import configure_torch

        configure_torch(threads)
        import isoclay.pipeline  # noqa: F401  (load the solver once, before the first item)


@dataclass
class Cluster:
    """client : distributed.Client; local : the LocalCluster we started (closed with us) or None;
    dashboard : URL of the Dask dashboard or None; started_seconds : time to get the workers ready."""

    client: object
    local: object | None
    dashboard: str | None
    started_seconds: float

    def workers(self) -> dict:
        """Worker address -> {"memory_limit": bytes or 0, "nthreads": n} as the scheduler reports them."""
        info = self.client.scheduler_info(n_workers=-1)["workers"]
        return {addr: {"memory_limit": w.get("memory_limit") or 0, "nthreads": w.get("nthreads", 1)} for addr, w in info.items()}

    def close(self) -> None:
        with contextlib.suppress(Exception):
            self.client.close()
        if self.local is not None:
            with contextlib.suppress(Exception):
                self.local.close()


def local_workers(requested: int | None) -> int:
    return requested or free_cores()


def local_memory_limit(workers: int, requested: int | None) -> int:
    """Bytes per local worker: as asked, else the machine's memory shared evenly (LocalCluster's own rule)."""
    if requested:
        return requested
    import psutil

    return int(psutil.virtual_memory().total // workers)


def _has_dashboard(client) -> bool:
    try:
        return bool(client.run_on_scheduler(lambda: importlib.util.find_spec("bokeh") is not None))
    except Exception:
        return False


def connect(scheduler: str | None = None, scheduler_file: str | None = None, workers: int | None = None,
            memory_limit: int | None = None, torch_threads: int = 1, timeout: float = 60.0) -> Cluster:
    """A client on the studio's scheduler (address or scheduler file) or on a new LocalCluster."""
    import time

    try:
        import dask
        from distributed import Client, LocalCluster
    except ImportError:
        raise InvalidInput("isoclay batch needs Dask distributed: run solver/setup.sh (pip install 'dask[distributed]')") from None
    t0 = time.perf_counter()
    local = None
    if scheduler or scheduler_file:
        target = scheduler or scheduler_file
        try:
            client = Client(scheduler_file=scheduler_file, timeout=timeout) if scheduler_file else Client(scheduler, timeout=timeout)
        except OSError as exc:
            raise InvalidInput(f"cannot reach the Dask scheduler at {target} ({exc}): start it with `dask scheduler` "
                               "and check the address") from None
        except ValueError as exc:
            raise InvalidInput(f"--scheduler {target}: {exc}; give tcp://HOST:PORT") from None
        try:
            client.wait_for_workers(1, timeout=timeout)
        except Exception:
            client.close()
            raise InvalidInput(f"the Dask scheduler at {target} has no workers after {timeout:.0f} s: start some with "
                               f"`dask worker {target}`") from None
    else:
        n = local_workers(workers)
        limit = local_memory_limit(n, memory_limit)
        env = {"OMP_WAIT_POLICY": "PASSIVE", "ISOCLAY_THREADS": str(torch_threads)}
        os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
        config = {f"distributed.nanny.pre-spawn-environ.{k}": v for k, v in env.items()}
        address = "127.0.0.1:8787" if importlib.util.find_spec("bokeh") else "127.0.0.1:0"
        with dask.config.set(config):
            local = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, memory_limit=limit,
                                 host="127.0.0.1", dashboard_address=address, silence_logs=logging.ERROR, env=env)
        client = Client(local)
    client.register_plugin(WorkerSetup(torch_threads), name=WorkerSetup.name)
    dashboard = client.dashboard_link if _has_dashboard(client) else None
    return Cluster(client, local, dashboard, time.perf_counter() - t0)
