"""Headless edits through a running solver: what `isoclay deform/smooth/sharpen --connection-file F` uses.

A command adds the options with ``add_remote_options(parser)``; when ``remote_requested(args)``
it calls ``run_remote_edit`` instead of running the pipeline in-process. Progress goes to the
console UI; Ctrl-C cancels the job on the server.
"""

from __future__ import annotations

import os
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import Cancelled, InvalidInput, InvalidMesh, SolverFailure
from ..mesh.types import TriangleMesh


@dataclass(frozen=True)
class RemoteOutcome:
    """mesh : result in world units (vertex_values carried); report, metrics : as the server stored them."""

    mesh: TriangleMesh
    report: dict
    metrics: dict
    node_id: str
    job_id: str
    warnings: tuple = field(default_factory=tuple)


def add_remote_options(parser) -> None:
    group = parser.add_argument_group("solver service (optional: run the edit on a running `isoclay serve`)")
    group.add_argument("--connection-file", default=None,
                       help="connection file of a running solver (endpoint and key); the edit runs there")
    group.add_argument("--endpoint", default=None,
                       help="solver endpoint tcp://HOST:PORT (the key still comes from the connection file)")
    group.add_argument("--source-key", default=None, help="history name of the object (default: the file name)")


def remote_requested(args) -> bool:
    return bool(getattr(args, "connection_file", None) or getattr(args, "endpoint", None))


def connection_from(args) -> dict:
    from ..client import ClientError, load_connection
    from .auth import default_run_dir

    path = args.connection_file or default_run_dir() / "solver.json"
    if not Path(os.path.expanduser(str(path))).exists():
        raise InvalidInput(f"no connection file at {path}: start `isoclay serve` or pass --connection-file")
    try:
        info = load_connection(str(path))
    except ClientError as exc:
        raise InvalidInput(str(exc)) from None
    if args.endpoint:
        if not args.endpoint.startswith(("tcp://", "ipc://")):
            raise InvalidInput(f"--endpoint {args.endpoint!r} must look like tcp://HOST:PORT")
        info["endpoint"] = args.endpoint
    return info


def run_remote_edit(connection: dict, mesh: TriangleMesh, task: str, params: dict, *, source_key: str,
                    fit: dict | None = None, progress=None, should_stop=None, timeout_s: float = 5.0,
                    job_id: str | None = None) -> RemoteOutcome:
    """Submit one edit to a solver, follow its progress, return the result (world units)."""
    from ..client import ClientError, KeyRejected, RemoteError, SolverClient, SolverUnreachable

    job_id = job_id or uuid.uuid4().hex
    body = dict(params)
    if fit:
        body["fit"] = dict(fit)
    try:
        client = SolverClient(connection, timeout_s=timeout_s, retries=3)
    except ClientError as exc:
        raise InvalidInput(str(exc)) from None
    try:
        client.submit(job_id, task, body, mesh.vertices, mesh.faces, source_key=source_key)
        last = None
        cancelled = False
        while True:
            state = client.poll(job_id)
            if state["state"] == "interrupted" and not state["stale"]:
                client.submit(job_id, task, body, mesh.vertices, mesh.faces, source_key=source_key)  # resume
                continue
            if progress and not state["stale"] and (state["stage"], state["fraction"]) != last and state["stage"]:
                progress(state["stage"], state["fraction"], state["info"])
                last = (state["stage"], state["fraction"])
            if state["state"] in ("done", "failed", "cancelled") and not state["stale"]:
                break
            if should_stop and should_stop() and not cancelled:
                client.cancel(job_id)
                cancelled = True
            time.sleep(0.1)
        if state["state"] == "cancelled":
            raise Cancelled(f"the solver cancelled job {job_id}; nothing was written")
        if state["state"] == "failed":
            raise (InvalidMesh if "mesh" in (state["error"] or "") else SolverFailure)(
                f"the solver could not run the {task}: {state['error']}")
        rec = client.result(job_id)
    except KeyRejected as exc:
        raise InvalidInput(str(exc)) from None
    except SolverUnreachable as exc:
        raise SolverFailure(str(exc)) from None
    except RemoteError as exc:
        raise (InvalidMesh if exc.code == "invalid_mesh" else InvalidInput)(str(exc)) from None
    finally:
        client.close()
    values = {k: np.array(v, dtype=np.float32) for k, v in rec.vertex_values.items()}
    out = TriangleMesh(np.array(rec.vertices, dtype=np.float64), np.array(rec.faces, dtype=np.int64), values)
    return RemoteOutcome(out, rec.report, rec.metrics, rec.node_id, job_id, rec.warnings)
