"""Handle groups of a deform request: their points travel as array frames and are kept as one blob.

Over the wire a deform in group form (docs/wire.md, CONTRACTS 1) sends params.groups[i] =
{"transform": 4x4, optional "name"} and each group's points as an array frame `handles:<i>`
((k_i, 3) <f8, world units), so a selection of tens of thousands of vertices never goes through
the header's item cap. At submit the frames are checked against the groups and stored as one
arrays blob whose digest goes into the stored parameters as "handle_blob"; the worker puts each
array back as params["groups"][i]["points"] before the edit runs.
"""

from __future__ import annotations

import re

import numpy as np

from ..history.blobs import BlobStore, pack_arrays, unpack_arrays

FRAME = re.compile(r"^handles:([0-9]{1,4})$")
BLOB_KEY = "handle_blob"


class HandleFrameError(ValueError):
    """The groups of a request and its handles:<i> frames do not match; the message is one line."""


def handle_frames(arrays: dict) -> dict[int, np.ndarray]:
    """Group index -> (k, 3) array of the `handles:<i>` frames of a message."""
    out = {}
    for name, array in arrays.items():
        match = FRAME.match(name)
        if match:
            out[int(match.group(1))] = array
    return out


def check_frames(params: dict, arrays: dict) -> dict[int, np.ndarray]:
    """The frames of a request, checked against params["groups"]; raises HandleFrameError.

    Either every group has exactly one frame handles:0 .. handles:<n-1> and no inline "points",
    or there are no frames at all (groups then carry their points inline, as from a handle file).
    """
    frames = handle_frames(arrays)
    groups = params.get("groups") if isinstance(params, dict) else None
    if not frames:
        return frames
    if not isinstance(groups, list) or not groups:
        raise HandleFrameError(f"the request carries {len(frames)} handles:<i> frame(s) but params.groups is "
                               "missing: send one group {\"transform\": ...} per frame")
    expected = set(range(len(groups)))
    if set(frames) != expected:
        missing = sorted(expected - set(frames))[:3]
        extra = sorted(set(frames) - expected)[:3]
        raise HandleFrameError(f"params.groups has {len(groups)} groups but the handle frames are "
                               f"{len(frames)} (missing {missing}, unexpected {extra}): send handles:0 .. "
                               f"handles:{len(groups) - 1}, one per group")
    for i, group in enumerate(groups):
        if not isinstance(group, dict):
            raise HandleFrameError(f"params.groups[{i}] must be a map with \"transform\"")
        if "points" in group:
            raise HandleFrameError(f"params.groups[{i}] has inline points and a frame handles:{i}: send the "
                                   "points once, as the frame")
        points = frames[i]
        if points.ndim != 2 or points.shape[1] != 3 or len(points) == 0 or points.dtype != np.dtype("<f8"):
            raise HandleFrameError(f"frame handles:{i} has shape {points.shape} and dtype {points.dtype}: "
                                   "send (k, 3) float64 points, k >= 1")
        if not np.isfinite(points).all():
            raise HandleFrameError(f"frame handles:{i} holds NaN or infinite coordinates: send finite points")
    return frames


def with_points(params: dict, frames: dict[int, np.ndarray]) -> dict:
    """A copy of params whose groups carry their frames as "points" (for validating at submit)."""
    if not frames:
        return params
    groups = [dict(g, points=np.array(frames[i], dtype=np.float64)) for i, g in enumerate(params["groups"])]
    return dict(params, groups=groups)


def store_frames(params: dict, frames: dict[int, np.ndarray], blobs: BlobStore) -> dict:
    """A copy of params with the frames stored as one arrays blob, named in params["handle_blob"]."""
    if not frames:
        return params
    digest = blobs.put_bytes(pack_arrays([(f"handles:{i}", frames[i]) for i in sorted(frames)]))
    return dict(params, **{BLOB_KEY: digest})


def restore_points(params: dict, blobs: BlobStore) -> dict:
    """A copy of stored params with each group's points back as (k, 3) float64 arrays (worker side)."""
    digest = params.get(BLOB_KEY) if isinstance(params, dict) else None
    if digest is None:
        return params
    arrays = unpack_arrays(blobs.read(digest))
    restored = dict(params)
    del restored[BLOB_KEY]
    restored["groups"] = [dict(g, points=np.array(arrays[f"handles:{i}"], dtype=np.float64))
                          for i, g in enumerate(params["groups"])]
    return restored


def echo_report(params: dict) -> dict:
    """Figures of the handle points a job received (the echo test task reports them)."""
    groups = params.get("groups") if isinstance(params, dict) else None
    if not isinstance(groups, list):
        return {}
    points = [np.asarray(g.get("points", np.zeros((0, 3))), dtype=np.float64) for g in groups if isinstance(g, dict)]
    total = np.concatenate(points) if points else np.zeros((0, 3))
    return {"handle_groups": float(len(points)), "handle_points": float(len(total)),
            "handle_sum": float(total.sum()) if len(total) else 0.0}
