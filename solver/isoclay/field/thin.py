"""Where a field cannot hold a part: surface points whose inside the field does not reach."""

from __future__ import annotations

import numpy as np

from ..geometry.field_values import values as field_values

#: A surface point is held when the field is negative half a fine cell inside it (a part two
#: half-cells thick keeps a node inside it and survives marching cubes at the field's resolution).
HELD_DEPTH_CELLS = 0.5
#: A part is reported when at least this share of its surface samples is not held (0.2%: one
#: sample in 500; a fin 1/500 of the object thick on a plate is about 8% of its surface).
REPORT_SHARE = 0.002


def not_held(field, points: np.ndarray, normals: np.ndarray, depth: float) -> np.ndarray:
    """(n,) bool: points (n, 3) on the surface with outward normals (n, 3) where the field is not
    negative ``depth`` inside (unit-box lengths)."""
    return field_values(field, np.asarray(points) - depth * np.asarray(normals)) >= 0


def thin_parts(field, points, normals, part_of_point: np.ndarray, cell: float) -> list[dict]:
    """Parts the field cannot hold: [{"part": i, "center": (3,) unit box, "share": fraction of the
    part's samples}], largest share first."""
    # not held half a cell in nor a cell and a half in: nothing solid there (a sharp edge the field
    # rounds is held farther in)
    lost = not_held(field, points, normals, HELD_DEPTH_CELLS * cell) & not_held(field, points, normals, 3 * HELD_DEPTH_CELLS * cell)
    out = []
    parts = np.unique(part_of_point)
    for part in parts:
        sel = part_of_point == part
        share = float(lost[sel].mean())
        if share >= REPORT_SHARE and lost[sel].sum() >= 3:
            out.append({"part": int(part), "center": points[sel & lost].mean(axis=0), "share": share})
    return sorted(out, key=lambda d: -d["share"])
