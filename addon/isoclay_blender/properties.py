"""Data the add-on keeps: per object (history key, result node, target empties), per scene (edit
settings, saved with the file) and per window manager (job progress and history list, not saved)."""

from __future__ import annotations

import uuid

import bpy
from bpy.props import (BoolProperty, CollectionProperty, EnumProperty, FloatProperty, FloatVectorProperty,
                       IntProperty, PointerProperty, StringProperty)

# Names the deform task understands; numbers behind them live in the solver.
STIFFNESS_ITEMS = [
    ("rubber", "Rubber", "Stretches freely; far parts barely follow"),
    ("soft", "Soft", "Gives easily, keeps some shape"),
    ("medium", "Medium", "Balanced between stretching and bending"),
    ("firm", "Firm", "Resists stretching; bends as a whole"),
    ("stiff", "Stiff", "Moves almost rigidly, bends only where it must"),
]


class IsoclayObjectProps(bpy.types.PropertyGroup):
    source_key: StringProperty(
        name="History key", description="Identifies this object's edit history in the solver", default="")
    node_id: StringProperty(name="Result of", description="Solver history entry this object was made from", default="")
    base_node: StringProperty(
        name="Start from", description="History entry the next edit of this object starts from (no refit)", default="")
    geometry_hash: StringProperty(
        name="Geometry hash", description="Content hash of the mesh when it came from the solver", default="")
    task: StringProperty(name="Task", default="")
    # set on target empties
    is_target: BoolProperty(name="Is target", default=False)
    target_source: PointerProperty(name="Target of", type=bpy.types.Object)
    target_group: IntProperty(name="Handle group", default=0, min=0)
    target_rest: FloatVectorProperty(name="Rest pose", size=16, default=[float(i % 5 == 0) for i in range(16)])


def ensure_source_key(obj: bpy.types.Object) -> str:
    """The object's history key, made on first use (copies of an object share its history)."""
    if not obj.isoclay.source_key:
        obj.isoclay.source_key = uuid.uuid4().hex
    return obj.isoclay.source_key


class IsoclaySceneSettings(bpy.types.PropertyGroup):
    stiffness: EnumProperty(name="Material", description="How the shape resists the pull of the handles",
                            items=STIFFNESS_ITEMS, default="medium")
    keep_topology: BoolProperty(
        name="Keep topology",
        description="Move the original vertices instead of building a new surface (keeps UVs and edge flow)",
        default=False)
    smooth_strength: FloatProperty(
        name="Strength", description="How far smoothing reaches: bumps smaller than this go away",
        default=0.01, min=1e-6, soft_max=1.0, subtype='DISTANCE', unit='LENGTH', precision=4)
    preserve_volume: BoolProperty(name="Keep volume", description="Stop smoothing from shrinking the shape",
                                  default=True)
    crisp_creases: BoolProperty(
        name="Crisp creases",
        description="Give a rebuilt surface its sharp creases back after smoothing: for hard-surface props "
                    "(lumpy organic shapes get needle-shaped triangles)",
        default=False)
    sharpen_amount: FloatProperty(name="Amount", description="How strongly creases and corners are crisped",
                                  default=0.5, min=0.0, soft_max=2.0)
    field_resolution: IntProperty(
        name="Field detail", description="Cells per axis of the fitted field: more keeps finer detail and takes longer",
        default=128, min=16, max=512)
    surface_resolution: IntProperty(
        name="Surface detail", description="Cells along the longest side when a new surface is built from the field",
        default=256, min=16, max=1024)
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
