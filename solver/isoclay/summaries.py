"""One line saying what an edit was, from its task and stored parameters ("3 handle groups, 1 turned 40 degrees, firm").

Pure Python (no numpy, no torch): the service returns it with every history node, and the Blender
add-on bundles a verbatim copy to describe an edit before it is sent. Never raises: a summary of
odd parameters is the task name.
"""

from __future__ import annotations

import math

#: Below these a handle group counts as held: 0.05 degrees of turn, 0.1% of scale and a move
#: of 1e-9 world units (an untouched target empty is exactly the identity).
TURN_EPS_DEG = 0.05
SCALE_EPS = 1e-3
MOVE_EPS = 1e-9


def _number(value) -> str:
    return f"{value:.3g}" if isinstance(value, (int, float)) and not isinstance(value, bool) else str(value)


def _motion(transform) -> tuple[float, float, float]:
    """(turn in degrees, largest scale change as a factor - 1, move) of a 4x4 row-major matrix (column vectors)."""
    m = [[float(x) for x in row] for row in transform]
    cols = [[m[r][c] for r in range(3)] for c in range(3)]
    scales = [math.sqrt(sum(x * x for x in col)) for col in cols]
    rot = [[m[r][c] / scales[c] if scales[c] > 0 else 0.0 for c in range(3)] for r in range(3)]
    cos = max(-1.0, min(1.0, (rot[0][0] + rot[1][1] + rot[2][2] - 1.0) / 2.0))
    turn = math.degrees(math.acos(cos))
    scale = max(abs(s - 1.0) for s in scales)
    move = math.sqrt(sum(m[r][3] ** 2 for r in range(3)))
    return turn, scale, move


def _deform(params: dict) -> str:
    stiffness = params.get("stiffness", "medium")
    parts = []
    groups = params.get("groups")
    if isinstance(groups, list):
        held = moved = turned = scaled = 0
        max_move = max_turn = max_scale = 0.0
        for group in groups:
            turn, scale, move = _motion(group["transform"])
            if turn > TURN_EPS_DEG:
                turned += 1
                max_turn = max(max_turn, turn)
            if scale > SCALE_EPS:
                scaled += 1
                max_scale = max(max_scale, scale)
            if turn <= TURN_EPS_DEG and scale <= SCALE_EPS:
                if move > MOVE_EPS:
                    moved += 1
                    max_move = max(max_move, move)
                else:
                    held += 1
        parts.append(f"{len(groups)} handle group" + ("s" if len(groups) != 1 else ""))
        if held:
            parts.append(f"{held} held")
        if moved:
            parts.append(f"{moved} moved " + ("up to " if moved > 1 else "") + _number(max_move))
        if turned:
            parts.append(f"{turned} turned " + ("up to " if turned > 1 else "") + f"{max_turn:.0f} degrees")
        if scaled:
            parts.append(f"{scaled} scaled " + ("up to " if scaled > 1 else "") + f"{1 + max_scale:.2f}x")
    else:
        handles, targets = params.get("handles", []), params.get("targets", [])
        moved = [math.dist(h, t) for h, t in zip(handles, targets) if math.dist(h, t) > MOVE_EPS]
        parts.append(f"{len(handles)} handle point" + ("s" if len(handles) != 1 else ""))
        if moved:
            parts.append(f"{len(moved)} moved " + ("up to " if len(moved) > 1 else "") + _number(max(moved)))
    parts.append(str(stiffness) if isinstance(stiffness, str) else f"stiffness {_number(stiffness)}")
    return ", ".join(parts)


def _creases(params: dict) -> str:
    creases = params.get("creases")
    if creases is None:
        creases = "crisp" if params.get("crisp_creases") else "auto"
    return f"creases {creases}"


def _output(params: dict) -> list[str]:
    out = []
    if params.get("closed"):
        out.append("closed")
    if params.get("keep_topology"):
        out.append("keep topology")
    return out


def describe_edit(task: str, params: dict) -> str:
    """A short line for a history list; lengths are in the edit's own (world) units."""
    try:
        params = params if isinstance(params, dict) else {}
        if task == "deform":
            return ", ".join([_deform(params), *_output(params)])
        if task == "smooth":
            return ", ".join([f"smooth {_number(params.get('strength'))}", _creases(params), *_output(params)])
        if task == "sharpen":
            radius = params.get("radius")
            reach = f"radius {_number(radius)}" if radius is not None else "radius detected"
            return ", ".join([f"sharpen {_number(params.get('amount'))}", reach, *_output(params)])
        if task == "remesh":
            detail = params.get("resolution")
            parts = [f"surface detail {detail}" if detail is not None else "surface detail auto"]
            if params.get("target_faces"):
                parts.append(f"at most {params['target_faces']} faces")
            return ", ".join(parts)
        return str(task)
    except (KeyError, TypeError, ValueError, IndexError, AttributeError):
        return str(task)
