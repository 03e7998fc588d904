"""The service's own limits: resources per job (JobLimits), the data folder, and handle counts per submit.

Every number here has a documented range (docs/parameters.md). The task's own parameters are
bounded by its Config.from_params, which the server runs at submit time (service/param_check.py).
"""

from __future__ import annotations

from dataclasses import dataclass

from ..bounds import whole_number
from ..errors import InvalidInput
from . import handle_groups

#: Handle points in one submit, over all groups and forms. An artist's selection of 44k
#: vertices is real (FACTS); 200,000 points are 4.8 MB of frames and several times any prop's
#: useful handle count, so more is a whole mesh passed as handles by mistake.
MAX_HANDLE_POINTS = 200_000
#: Handle groups in one submit: each is a target empty the artist places by hand, and each
#: travels as one array frame (wire.MAX_ARRAYS bounds the frames of a message).
MAX_HANDLE_GROUPS = 64


@dataclass
class JobLimits:
    """Resource limits of the service (see `isoclay serve --help` and docs/parameters.md)."""

    max_queue: int = 16  # queued jobs beyond the running ones; more get "busy"
    max_workers: int = 1  # jobs running at once
    memory_bytes: int = 8 << 30  # address-space limit of a worker process
    time_s: float = 3600.0  # wall-clock limit of one job
    cancel_grace_s: float = 0.8  # cooperative stop time before terminate (kill after twice this)
    threads: int | None = None  # torch threads per worker (default: free cores)
    cache_max_bytes: int = 2 << 30
    # Everything in the data folder (history, uploads, cache). A node of a 2M-vertex scan holds
    # its result mesh (~100 MB) and up to two field checkpoints (9 MB at resolution 128, 69 MB
    # at 256): 20 GiB keep a few hundred such edits; past it cached fields go first, oldest first.
    data_max_bytes: int = 20 << 30
    test_params: bool = False  # allow echo's test knobs (delay, crash...): tests and benchmarks only


def _listed_points(value) -> int:
    return len(value) if isinstance(value, list) else 0


def check_handle_counts(params: dict, arrays: dict) -> None:
    """Refuse a submit with more than MAX_HANDLE_GROUPS groups or MAX_HANDLE_POINTS handle points,
    counting the point form ("handles" lists), the group form's listed points and `handles:<i>` frames."""
    frames = handle_groups.handle_frames(arrays)
    groups = params.get("groups") if isinstance(params.get("groups"), list) else []
    n_groups = max(len(groups), len(frames))
    if n_groups > MAX_HANDLE_GROUPS:
        raise InvalidInput(f"{n_groups} handle groups in one edit (limit {MAX_HANDLE_GROUPS}): merge groups that "
                           "move together into one")
    points = _listed_points(params.get("handles")) + sum(int(a.shape[0]) for a in frames.values())
    points += sum(_listed_points(g.get("points")) for g in groups if isinstance(g, dict))
    whole_number("handle points in one edit", points, 0, MAX_HANDLE_POINTS, "",
                 "select fewer vertices per handle: a few dozen per group hold a region as well as thousands")
