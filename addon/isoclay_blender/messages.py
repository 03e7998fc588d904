"""Solver errors rewritten for the artist: what happened, and what to do in Blender's UI. No bpy here.

The solver's messages name command-line flags and internal terms ("refit the field", "the box is
entirely outside the shape"); the panel must name the add-on's own controls instead. Each rule is a
pattern of a solver message (tests/test_addon_messages.py feeds it the solver's real errors) and the
artist's line; anything unknown still gets a sentence that says the scene is unchanged.
"""

from __future__ import annotations

import re

# (pattern, artist's line). Groups of the pattern can be used as {1}, {2}... in the line.
RULES = (
    (r"surface samples landed on the field's zero level set|refit the field",
     "The fitted field does not follow this object's surface closely enough to deform it: raise Field detail "
     "(Reshape panel), apply the object's scale (Ctrl A), and try again"),
    (r"no surface in the extraction box|entirely (outside|inside) the shape",
     "The edit left no surface to rebuild (the shape collapsed or moved away): use a gentler setting "
     "(less Strength or Amount, or move the targets less)"),
    (r"keep-topology: vertex \d+ would move|keep_topology.*too far",
     "Keep topology cannot follow this edit: some vertices would move too far. Untick Keep topology for a "
     "rebuilt surface, or use a gentler setting"),
    (r"keep-topology: \d+ vertices could not reach|keep-topology: \d+ triangles would turn over",
     "Keep topology cannot follow this edit without tangling the mesh: untick Keep topology for a rebuilt "
     "surface, or use a gentler setting"),
    (r"strength ([0-9.eE+-]+) is too large for an object ([0-9.eE+-]+) long \((?:limit|at most) ([0-9.eE+-]+)\)",
     "Strength {1} is too large for this object ({2} long): use at most {3} (Smooth box)"),
    (r"strength .* must be a positive length|strength is missing",
     "Strength must be a positive length: set it in the Smooth box"),
    (r"sharpen: amount .* out of range|amount is missing",
     "Amount must be above 0 and at most 1: set it in the Sharpen box"),
    (r"sharpen: radius ([0-9.eE+-]+) is too large for an object ([0-9.eE+-]+) long \((?:limit|at most) ([0-9.eE+-]+)\)",
     "Roundness {1} is too large for this object ({2} long): use at most {3}, or tick Detect roundness"),
    (r"sharpen: radius .* must be a positive length",
     "Roundness must be a positive length, or tick Detect roundness (Sharpen box)"),
    (r"handle (\d+) is ([0-9.eE+-]+) \S+ from the surface",
     "A handle lies off the surface the solver sees ({2} away): add handles on vertices of the object itself "
     "(not of a modifier's copy), or raise Field detail"),
    (r"a target is ([0-9.]+) bounding-box diagonals from its handle",
     "A target empty is {1} object sizes away from its handle: move targets at most about one object size per "
     "edit, and deform again from the result for more"),
    (r"no handles given|handles but \d+ targets",
     "The object has no usable handles: select vertices in Edit Mode and press Add Handle from Selection"),
    (r"repeats handle \d+ .* with a different target",
     "One vertex belongs to two handles that pull it to different places: remove it from one (Remove Selected "
     "from Handles)"),
    (r"deformation diverged",
     "The deformation ran away: choose a stiffer Material or move the targets less far, then deform again"),
    (r"targets fold the prop through itself",
     "These targets would fold the object through itself: move the target empties less far, or add a handle on "
     "the part between them, then deform again"),
    (r"stopped after (\d+) iterations before settling; the handles are within ([0-9.]+%)",
     "The deformation stopped after {1} steps before it settled (handles within {2} of the object's size): "
     "deform again from the result, or move the targets in smaller steps"),
    (r"unknown (deform setting|parameter\(s\)|fit setting) '?([A-Za-z_]+)",
     "This solver does not know the setting '{2}' the add-on sent: install the solver and add-on of the same "
     "isoclay version"),
    (r"unknown stiffness|stiffness .* out of range",
     "That Material is unknown to this solver: pick one from the list, or update the solver"),
    (r"needs about ([0-9.]+) GiB, the solver allows ([0-9.]+) GiB",
     "This edit needs about {1} GiB, more than the solver allows ({2} GiB): lower Field detail, decimate the "
     "object, or start the solver with a higher memory limit"),
    (r"killed \(SIGKILL\) by another process",
     "The solver's worker was stopped from outside (not for lack of memory): press the button again; if it keeps "
     "happening, check what stops processes on the solver's machine"),
    (r"ran out of memory|most likely for memory|out of memory",
     "The solver ran out of memory on this object: lower Field detail or Surface detail, or decimate the object"),
    (r"killed \(SIGKILL\)",
     "The solver's worker was stopped (perhaps for memory): try again; if it repeats, lower Field detail or "
     "decimate the object"),
    (r"time limit|CPU-time limit",
     "The edit took longer than the solver allows: lower Field detail or Surface detail, or start the solver "
     "with a longer time limit"),
    (r"queue is full",
     "The solver is busy with other edits: wait for one to finish or cancel it, then try again"),
    (r"absurd size \(bounding-box diagonal ([0-9.eE+-]+)",
     "The object is {1} units across, too small or too large to edit: apply its scale (Ctrl A > Scale) or check "
     "the scene's units"),
    (r"NaN or infinite coordinates",
     "Some vertices have invalid (infinite) positions: fix or delete them in Edit Mode first"),
    (r"only degenerate faces|has no faces|no vertices",
     "The object has no faces with area: the solver needs a surface (fill holes or add faces first)"),
    (r"is too large \((\d+) vertices, (\d+) faces",
     "The object is too large ({1} vertices): decimate it first (Decimate modifier)"),
    (r"fit resolution (\d+) is out of range: use (\d+) to (\d+)",
     "Field detail {1} is outside what this solver accepts ({2} to {3}): change it in the Reshape panel"),
    (r"field resolution (\d+) out of range: use (\d+)\.\.(\d+)",
     "Field detail {1} is outside what this solver accepts ({2} to {3}): change it in the Reshape panel"),
    (r"resolution .* out of range",
     "Surface detail is outside what this solver accepts: change it in the Reshape panel"),
    (r"is not in this solver's history",
     "That history entry is not on this solver (another solver or history folder?): press Refresh History"),
    (r"unknown task '(\w+)'",
     "This solver cannot run '{1}': install the solver and add-on of the same isoclay version"),
    (r"params\.groups|handles:<i>|handle frames",
     "The handles could not be sent as the solver expects: install the solver and add-on of the same isoclay "
     "version"),
    (r"worker crashed|worker exited unexpectedly|internal error",
     "The solver failed inside ({0}); the scene is unchanged: try again, and report it if it repeats"),
)
_COMPILED = tuple((re.compile(pattern, re.IGNORECASE), line) for pattern, line in RULES)


def rule_for(text: str):
    """The (compiled pattern, line) that rewrites `text`, or None."""
    for pattern, line in _COMPILED:
        if pattern.search(text or ""):
            return pattern, line
    return None


def for_artist(text: str, task: str = "edit") -> str:
    """One line for the panel: the solver's `text` in the artist's words (what happened, what to do)."""
    text = " ".join(str(text or "").split())
    found = rule_for(text)
    if found is None:
        detail = text or "no reason given"
        return f"The {task} did not finish ({detail}); the scene is unchanged"
    pattern, line = found
    match = pattern.search(text)
    groups = [text[:160]] + [g or "" for g in match.groups()]
    return line.format(*groups)
