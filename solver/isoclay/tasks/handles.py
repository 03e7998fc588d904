"""Handles and targets for a deformation: reading H.json, validating, checking they sit on the surface.

H.json (DESIGN.md): {"handles": [[x, y, z], ...], "targets": [[x, y, z], ...]} in the mesh's
own units; a handle whose target equals itself stays put. Every problem is one line naming
the handle and what to do.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InvalidInput

#: More handles than this is almost certainly a mistake (a whole mesh passed as handles).
MAX_HANDLES = 10_000
#: A handle farther than this fraction of the bounding-box diagonal from the surface is refused.
SURFACE_TOLERANCE_REL = 0.02


@dataclass(frozen=True)
class HandleSet:
    """handles, targets : (k, 3) float64 in the caller's units; row i of targets is where handle i must go."""

    handles: np.ndarray
    targets: np.ndarray

    @property
    def count(self) -> int:
        return int(self.handles.shape[0])

    def moved(self, tolerance: float = 0.0) -> np.ndarray:
        """(k,) bool: handles whose target differs from them by more than tolerance."""
        return np.linalg.norm(self.targets - self.handles, axis=1) > tolerance


def read_handle_file(path: str | os.PathLike) -> dict:
    """Load H.json as a dict; a missing or malformed file is a one-line InvalidInput."""
    path = Path(path)
    if not path.is_file():
        raise InvalidInput(f"{path}: no such handle file; write one with \"handles\" and \"targets\" lists")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise InvalidInput(f"{path.name} is not a text file: the handle file must be JSON") from None
    except json.JSONDecodeError as exc:
        raise InvalidInput(f"{path.name} is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})") from None
    if not isinstance(data, dict):
        raise InvalidInput(f"{path.name} must hold a JSON object with \"handles\" and \"targets\", found {type(data).__name__}")
    return data


def _points(value, name: str) -> np.ndarray:
    if value is None:
        raise InvalidInput(f"the handle file has no \"{name}\" list: give {name} as [[x, y, z], ...]")
    if isinstance(value, (str, bytes)) or not hasattr(value, "__len__"):
        raise InvalidInput(f"\"{name}\" must be a list of [x, y, z] points, found {type(value).__name__}")
    if len(value) > MAX_HANDLES:
        raise InvalidInput(f"\"{name}\" has {len(value)} points (limit {MAX_HANDLES}): pick fewer handle points")
    rows = []
    for i, p in enumerate(value):
        if isinstance(p, (str, bytes)) or not hasattr(p, "__len__") or len(p) != 3:
            raise InvalidInput(f"{name} point {i} must be three numbers [x, y, z], found {p!r}"[:200])
        try:
            row = [float(c) for c in p]
        except (TypeError, ValueError):
            raise InvalidInput(f"{name} point {i} must be three numbers [x, y, z], found {p!r}"[:200]) from None
        if isinstance(p[0], bool) or isinstance(p[1], bool) or isinstance(p[2], bool):
            raise InvalidInput(f"{name} point {i} must be three numbers [x, y, z], found {p!r}"[:200])
        if not all(math.isfinite(c) for c in row):
            raise InvalidInput(f"{name} point {i} has a NaN or infinite coordinate {p!r}: give finite numbers"[:200])
        rows.append(row)
    return np.asarray(rows, dtype=np.float64).reshape(-1, 3)


def parse_handles(params: dict) -> HandleSet:
    """Validate {"handles": ..., "targets": ...} (world units) into a HandleSet.

    Refuses: missing lists, non-numeric or NaN coordinates, no handles, count mismatch, the
    same handle given twice with different targets. Exact repeats are merged.
    """
    if not isinstance(params, dict):
        raise InvalidInput(f"handles must be given as an object with \"handles\" and \"targets\", found {type(params).__name__}")
    handles = _points(params.get("handles"), "handles")
    targets = _points(params.get("targets"), "targets")
    if len(handles) == 0:
        raise InvalidInput("no handles given: pick at least one handle point on the surface")
    if len(handles) != len(targets):
        raise InvalidInput(
            f"{len(handles)} handles but {len(targets)} targets: give exactly one target per handle "
            "(a handle that stays put has itself as target)"
        )
    uniq, first, inverse = np.unique(handles, axis=0, return_index=True, return_inverse=True)
    inverse = inverse.ravel()
    if len(uniq) < len(handles):
        for i in range(len(handles)):
            j = first[inverse[i]]
            if j != i and not np.array_equal(targets[i], targets[j]):
                raise InvalidInput(
                    f"handle {i} repeats handle {j} at {handles[i].tolist()} with a different target: "
                    "one point cannot go to two places, remove one of them"
                )
        keep = np.sort(first)
        handles, targets = handles[keep], targets[keep]
    return HandleSet(handles, targets)


def check_on_surface(distances: np.ndarray, limit: float, units_per_length: float = 1.0, unit_name: str = "units") -> None:
    """Refuse handles whose |distance to the surface| exceeds limit.

    distances : (k,) |field value| at each handle (the field's length units); limit : same units;
    units_per_length : factor turning those lengths into the user's units for the message.
    """
    distances = np.abs(np.asarray(distances, dtype=np.float64))
    bad = np.flatnonzero(~(distances <= limit))
    if len(bad):
        i = int(bad[np.argmax(distances[bad])])
        raise InvalidInput(
            f"handle {i} is {distances[i] * units_per_length:.4g} {unit_name} from the surface "
            f"(limit {limit * units_per_length:.4g}, {SURFACE_TOLERANCE_REL:.0%} of the bounding-box diagonal)"
            f"{f' and {len(bad) - 1} more' if len(bad) > 1 else ''}: pick handle points on the mesh"
        )
