"""Data the add-on keeps: per object (history key, result node, target empties), per scene (edit
settings, saved with the file) and per window manager (job progress and history list, not saved)."""

from __future__ import annotations

import uuid

import bpy
from .limits import FIELD_DETAIL_RANGE, HOLE_FILL_MODES, SHARPEN_AMOUNT_RANGE, SURFACE_DETAIL_RANGE
from bpy.props import (BoolProperty, CollectionProperty, EnumProperty, FloatProperty, FloatVectorProperty,
                       IntProperty, PointerProperty, StringProperty)

# Names the deform task understands; numbers behind them live in the solver.
STIFFNESS_ITEMS = [
    ("rubber", "Rubber", "Keeps its volume like rubber: bulges where squeezed; a sheet acts very thin"),
    ("soft", "Soft", "Keeps most of its volume, like soft clay; a sheet acts thin"),
    ("medium", "Medium", "Keeps its volume moderately, like worked metal; a sheet acts of medium thickness"),
    ("firm", "Firm", "Lets its volume follow the bend a little more; a sheet acts thick"),
    ("stiff", "Stiff", "A plain as-rigid-as-possible solid, volume free; a sheet acts very thick"),
]

# How Rebuild Surface closes an open scan's holes (solver names, in HOLE_FILL_MODES order).
HOLE_FILL_ITEMS = [
    ("auto", "Auto", "Holes up to a quarter of the object's size continue the surface around them; wider "
                     "openings, like a cup's mouth, get a flat lid"),
    ("smooth", "Continue", "Every hole continues the surface around it"),
    ("flat", "Lid", "Every hole gets a flat lid"),
]
assert tuple(item[0] for item in HOLE_FILL_ITEMS) == HOLE_FILL_MODES


class IsoclayObjectProps(bpy.types.PropertyGroup):
    source_key: StringProperty(
        name="History key", description="Identifies this object's edit history in the solver", default="")
    node_id: StringProperty(name="Result of", description="Solver history entry this object was made from", default="")
    base_node: StringProperty(
        name="Start from", description="History entry the next edit of this object starts from (no refit)", default="")
    geometry_hash: StringProperty(
        name="Geometry hash", description="Content hash of the mesh when it came from the solver", default="")
    task: StringProperty(name="Task", default="")
    distortion_view: EnumProperty(
        name="Show", description="Which distortion the result's colours show",
        items=[("stretch", "Stretch", "How much the surface stretched or shrank"),
               ("bend", "Bend", "How much the surface's curvature changed"),
               ("none", "Off", "Show the object's own colours")],
        default="stretch", update=_distortion_view_changed)
    # set on target empties
    is_target: BoolProperty(name="Is target", default=False)
    target_source: PointerProperty(name="Target of", type=bpy.types.Object)
    target_group: IntProperty(name="Handle group", default=0, min=0)
    target_rest: FloatVectorProperty(name="Rest pose", size=16, default=[float(i % 5 == 0) for i in range(16)])


# History keys this session has seen, by the object's session_uid (stable across undo): an undo to a
# state before an edit's key was written must not cut the object off from its solver history.
_KEYS_BY_UID: dict[int, str] = {}


def source_key_of(obj: bpy.types.Object) -> str:
    """The object's history key, or the one this session gave it before an undo removed it, or ""."""
    return obj.isoclay.source_key or _KEYS_BY_UID.get(obj.session_uid, "")


def ensure_source_key(obj: bpy.types.Object) -> str:
    """The object's history key, made on first use (copies of an object share its history)."""
    key = source_key_of(obj)
    if not key:
        key = uuid.uuid4().hex
    if obj.isoclay.source_key != key:
        obj.isoclay.source_key = key
    _KEYS_BY_UID[obj.session_uid] = key
    return key


def restore_source_keys() -> int:
    """After undo or redo: put back history keys that the restored state predates. Returns how many."""
    restored = 0
    for obj in bpy.data.objects:
        key = _KEYS_BY_UID.get(obj.session_uid)
        if key and not obj.isoclay.source_key:
            obj.isoclay.source_key = key
            restored += 1
        elif obj.isoclay.source_key:
            _KEYS_BY_UID.setdefault(obj.session_uid, obj.isoclay.source_key)
    return restored


CREASE_ITEMS = [
    ("auto", "Auto", "Decide from the shape: creases between flat sides are kept crisp, organic forms stay soft"),
    ("crisp", "Crisp", "Always restore sharp creases (hard-surface props)"),
    ("soft", "Soft", "Never restore creases (organic scans)"),
]


def _distortion_view_changed(self, context):
    from .results import show_distortion

    show_distortion(context, self.id_data, self.distortion_view)


class IsoclaySceneSettings(bpy.types.PropertyGroup):
    stiffness: EnumProperty(name="Material", description="How the solid keeps its volume where it bends or is "
                            "squeezed (the shape a handle asks for does not depend on hardness); for a sheet with "
                            "no inside, how thick it acts",
                            items=STIFFNESS_ITEMS, default="medium")
    keep_topology: BoolProperty(
        name="Keep topology",
        description="Move the object's own vertices instead of building a new surface: faces, UVs, materials, "
                    "groups, attributes and shape keys stay as they are",
        default=False)
    smooth_strength: FloatProperty(
        name="Strength", description="Bumps smaller than this go away (at most a quarter of the object's longest side)",
        default=0.01, min=1e-6, soft_max=1.0, subtype='DISTANCE', unit='LENGTH', precision=4)
    creases: EnumProperty(name="Creases", description="What smoothing does with sharp creases",
                          items=CREASE_ITEMS, default="auto")
    closed_result: BoolProperty(
        name="Closed result",
        description="Smooth and Sharpen: close holes of an open scan (off: an open scan comes back open)",
        default=False)
    sharpen_amount: FloatProperty(name="Amount", description="How far rounded creases and corners go back to sharp (1 = fully)",
                                  default=0.5, min=SHARPEN_AMOUNT_RANGE[0], max=SHARPEN_AMOUNT_RANGE[1])
    sharpen_detect_radius: BoolProperty(
        name="Detect roundness", description="Let the solver find how round the softened creases are",
        default=True)
    sharpen_radius: FloatProperty(
        name="Roundness", description="Radius of the rounding to undo (at most two fifths of the object's longest side)",
        default=0.01, min=1e-6, soft_max=1.0, subtype='DISTANCE', unit='LENGTH', precision=4)
    field_resolution: IntProperty(
        name="Field detail", description="Finest cells along the object's longest side of the fitted field (fine cells "
        "only near the surface, where the shape needs them): more keeps finer detail and takes longer",
        default=1024, min=FIELD_DETAIL_RANGE[0], max=FIELD_DETAIL_RANGE[1])
    surface_auto: BoolProperty(
        name="Auto surface detail", description="Let the solver size a rebuilt surface from the object's own edges",
        default=True)
    surface_resolution: IntProperty(
        name="Surface detail", description="Cells along the longest side when a new surface is built from the field",
        default=256, min=SURFACE_DETAIL_RANGE[0], max=SURFACE_DETAIL_RANGE[1])
    hole_fill: EnumProperty(name="Holes", description="Rebuild Surface: how the holes of an open scan are closed",
                            items=HOLE_FILL_ITEMS, default="auto")
    keep_source_visible: BoolProperty(
        name="Keep source visible", description="Leave the original object visible next to the result",
        default=False)


class IsoclayHistoryItem(bpy.types.PropertyGroup):
    node_id: StringProperty()
    parent: StringProperty()
    task: StringProperty()
    summary: StringProperty()
    created: StringProperty()
    quality: StringProperty()
    current: BoolProperty()


class IsoclayRuntime(bpy.types.PropertyGroup):
    """Live state for the panels; never saved with the file."""

    running: BoolProperty(default=False)
    task: StringProperty(default="")
    stage: StringProperty(default="")
    progress: FloatProperty(default=0.0, min=0.0, max=1.0, subtype='FACTOR')
    message: StringProperty(default="")
    last_error: StringProperty(default="")
    notice: StringProperty(default="")
    history: CollectionProperty(type=IsoclayHistoryItem)
    history_index: IntProperty(default=0)
    history_key: StringProperty(default="")
    history_error: StringProperty(default="")


classes = (IsoclayObjectProps, IsoclaySceneSettings, IsoclayHistoryItem, IsoclayRuntime)


def register_properties() -> None:
    bpy.types.Object.isoclay = PointerProperty(type=IsoclayObjectProps)
    bpy.types.Scene.isoclay = PointerProperty(type=IsoclaySceneSettings)
    bpy.types.WindowManager.isoclay = PointerProperty(type=IsoclayRuntime)


def unregister_properties() -> None:
    del bpy.types.WindowManager.isoclay
    del bpy.types.Scene.isoclay
    del bpy.types.Object.isoclay
