"""Handles and targets for a deformation: reading H.json, validating, checking they sit on the surface.

Two forms, both in the mesh's own units (DESIGN.md; docs/deformation.md):
- points: {"handles": [[x, y, z], ...], "targets": [[x, y, z], ...]}; a handle whose target
  equals itself stays put; the turn of a region is left free unless its points fix it.
- groups: {"groups": [{"points": [[x, y, z], ...], "transform": 4x4}, ...]}: each group of
  held points follows its target empty's motion, a 4 x 4 matrix (row-major nested lists,
  column vectors: target = T @ [p, 1]), so a region can be moved, turned and scaled; the
  identity holds the group's position and orientation. Over the wire a group's points arrive
  as one array (the service puts them back as a (k, 3) array under "points").
Every problem is one line naming the handle or group and what to do.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InvalidInput

#: Point-form handles: more than this is almost certainly a mistake (a whole mesh passed as handles).
MAX_HANDLES = 10_000
#: Group form: at most this many groups (one target empty each) and points over all groups. The
#: solver keeps at most a few points per lattice cell of each group (deform.reduce_points), so a
#: 44k-vertex selection costs no more than a small one; beyond 200k the upload itself is the cost.
MAX_GROUPS = 64
MAX_GROUP_POINTS = 200_000
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


@dataclass(frozen=True)
class HandleGroup:
    """One held region: points (k, 3) float64 and where each goes, in the caller's units.

    targets : (k, 3); transform : (4, 4) float64 for the group form (targets = transform applied
    to points), None for point-form handles, whose targets are given one by one.
    """

    points: np.ndarray
    targets: np.ndarray
    transform: np.ndarray | None = None
    name: str = ""


def _transform(value, index: int) -> np.ndarray:
    try:
        t = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInput(f"group {index}: transform must be a 4 x 4 matrix of numbers") from None
    if t.shape == (16,):
        t = t.reshape(4, 4)
    if t.shape != (4, 4):
        raise InvalidInput(f"group {index}: transform must be a 4 x 4 matrix (16 numbers), found shape {t.shape}")
    if not np.isfinite(t).all():
        raise InvalidInput(f"group {index}: transform has a NaN or infinite entry: give finite numbers")
    if not np.allclose(t[3], [0.0, 0.0, 0.0, 1.0], atol=1e-9):
        raise InvalidInput(f"group {index}: transform's last row must be 0 0 0 1 (an affine motion, no perspective)")
    det = float(np.linalg.det(t[:3, :3]))
    if not det > 1e-9:
        raise InvalidInput(
            f"group {index}: the target empty is mirrored or scaled to nothing (determinant {det:.3g}): "
            "reset its scale to positive values"
        )
    return t


def _group_points(value, index: int) -> np.ndarray:
    if value is None:
        raise InvalidInput(f"group {index} has no points: give the held vertices' positions as [[x, y, z], ...]")
    if isinstance(value, (list, tuple)) and len(value) > MAX_GROUP_POINTS:
        raise InvalidInput(f"group {index} has {len(value)} points (limit {MAX_GROUP_POINTS}): hold fewer vertices")
    try:
        points = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInput(f"group {index}: points must be a list of [x, y, z] numbers") from None
    if points.size == 0:
        raise InvalidInput(f"group {index} has no points: every target empty needs held vertices")
    if points.ndim != 2 or points.shape[1] != 3:
        raise InvalidInput(f"group {index}: points must be a list of [x, y, z] (shape (k, 3)), found shape {points.shape}")
    if not np.isfinite(points).all():
        raise InvalidInput(f"group {index}: a point has a NaN or infinite coordinate: give finite numbers")
    return points


def parse_groups(params: dict) -> tuple[HandleGroup, ...]:
    """Validate either form (see module docstring) into handle groups, caller's units.

    Point-form handles become one group without a transform. Refuses: both forms at once, no
    handles, too many groups or points, malformed transforms (one line each).
    """
    if not isinstance(params, dict):
        raise InvalidInput(f"handles must be given as an object with \"groups\" or \"handles\" and \"targets\", found {type(params).__name__}")
    has_points = params.get("handles") is not None or params.get("targets") is not None
    groups = params.get("groups")
    if groups is None:
        hs = parse_handles(params)
        return (HandleGroup(hs.handles, hs.targets, None, "handles"),)
    if has_points:
        raise InvalidInput("give either \"groups\" or \"handles\" and \"targets\", not both")
    if not isinstance(groups, (list, tuple)) or not groups:
        raise InvalidInput("\"groups\" must be a non-empty list of {\"points\": [[x, y, z], ...], \"transform\": 4x4}")
    if len(groups) > MAX_GROUPS:
        raise InvalidInput(f"{len(groups)} handle groups (limit {MAX_GROUPS}): merge some groups")
    out, total = [], 0
    for i, g in enumerate(groups):
        if not isinstance(g, dict):
            raise InvalidInput(f"group {i} must be an object with \"points\" and \"transform\"")
        unknown = set(g) - {"points", "transform", "name"}
        if unknown:
            raise InvalidInput(f"group {i}: unknown field {sorted(unknown)[0]!r}; a group has points, transform and name")
        points = _group_points(g.get("points"), i)
        if len(points) == 0:
            raise InvalidInput(f"group {i} has no points: every target empty needs held vertices")
        total += len(points)
        if total > MAX_GROUP_POINTS:
            raise InvalidInput(f"the handle groups hold more than {MAX_GROUP_POINTS} points: hold fewer vertices")
        t = _transform(g.get("transform", np.eye(4)), i)
        name = g.get("name", f"group {i}")
        if not isinstance(name, str):
            raise InvalidInput(f"group {i}: name must be text")
        targets = points @ t[:3, :3].T + t[:3, 3]
        out.append(HandleGroup(points, targets, t, name[:64]))
    return tuple(out)
