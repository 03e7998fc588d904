"""Sidebar tab "Isoclay" in the 3D viewport: display only; every action is an operator."""

from __future__ import annotations

import bpy
import numpy as np

from . import handles, preflight, solver_process
from .preferences import draw_status
from .properties import source_key_of

TAB = "Isoclay"


class _SidebarPanel:
    bl_space_type = 'VIEW_3D'
    bl_region_type = 'UI'
    bl_category = TAB


class ISOCLAY_PT_solver(_SidebarPanel, bpy.types.Panel):
    bl_idname = "ISOCLAY_PT_solver"
    bl_label = "Solver"

    def draw(self, context):
        layout = self.layout
        draw_status(layout)
        row = layout.row(align=True)
        if solver_process.LINK.configured():
            row.operator("isoclay.check_solver", text="Check", icon='FILE_REFRESH')
            row.operator("isoclay.stop_solver", text="Stop", icon='PAUSE')
        else:
            row.operator("isoclay.start_solver", text="Start", icon='PLAY')
        row.operator("preferences.addon_show", text="", icon='PREFERENCES').module = __package__


class ISOCLAY_PT_handles(_SidebarPanel, bpy.types.Panel):
    bl_idname = "ISOCLAY_PT_handles"
    bl_label = "Handles"

    def draw(self, context):
        layout = self.layout
        obj = context.active_object
        if obj is None or obj.type != 'MESH':
            layout.label(text="Select a mesh object")
            return
        groups, vertices, moved = handles.handle_summary(obj)
        layout.label(text=f"{groups} handles, {vertices} vertices, {moved} targets moved")
        col = layout.column(align=True)
        if obj.mode == 'EDIT':
            col.operator("isoclay.add_handle", icon='ADD')
            col.operator("isoclay.remove_handle", icon='REMOVE')
        else:
            col.label(text="Select vertices in Edit Mode to add handles", icon='INFO')
        row = col.row(align=True)
        row.operator("isoclay.reset_targets", icon='LOOP_BACK')
        row.operator("isoclay.clear_handles", icon='TRASH')


_SWATCHES = {"collection": None}
SWATCH_COUNT = 7


def swatch_icons() -> list[int]:
    """Icon ids of small squares in the distortion colour map, dark to bright (made once per session)."""
    import bpy.utils.previews

    from .colours import ramp_srgb

    coll = _SWATCHES["collection"]
    if coll is None:
        coll = bpy.utils.previews.new()
        for i, rgb in enumerate(ramp_srgb(np.linspace(0.0, 1.0, SWATCH_COUNT))):
            icon = coll.new(f"swatch{i}")
            icon.icon_size = (16, 16)
            icon.icon_pixels_float = np.tile(np.append(rgb, 1.0), 16 * 16).tolist()
        _SWATCHES["collection"] = coll
    return [coll[f"swatch{i}"].icon_id for i in range(SWATCH_COUNT)]


def free_swatches() -> None:
    import bpy.utils.previews

    if _SWATCHES["collection"] is not None:
        bpy.utils.previews.remove(_SWATCHES["collection"])
        _SWATCHES["collection"] = None


def draw_legend(layout, obj) -> None:
    """Stretch / bend switch and a legend: the colour map with the numbers behind its two ends."""
    from .results import distortion_legend

    if obj is None or obj.type != 'MESH' or not any(f"isoclay_{k}_scale" in obj.data for k in ("stretch", "bend")):
        return
    box = layout.box()
    box.label(text="Distortion", icon='COLOR')
    box.row().prop(obj.isoclay, "distortion_view", expand=True)
    legend = distortion_legend(obj)
    if legend is None:
        return
    row = box.row(align=True)
    row.label(text=f"{legend['low']:.2g}")
    for icon in swatch_icons():
        row.label(text="", icon_value=icon)
    row.label(text=f"{legend['high']:.3g}")
    box.label(text=f"{legend['kind']}: dark = none, bright = {legend['high']:.3g} or more (largest {legend['max']:.3g})")


def object_counts(context, obj) -> tuple[int, int]:
    """(vertices, triangles) of the mesh that would be sent (modifiers applied)."""
    mesh = obj.evaluated_get(context.evaluated_depsgraph_get()).data
    return len(mesh.vertices), max(0, len(mesh.loops) - 2 * len(mesh.polygons))


class ISOCLAY_PT_edit(_SidebarPanel, bpy.types.Panel):
    bl_idname = "ISOCLAY_PT_edit"
    bl_label = "Reshape"

    def draw(self, context):
        layout = self.layout
        settings = context.scene.isoclay
        runtime = context.window_manager.isoclay
        obj = context.active_object

        if obj is not None and obj.type == 'MESH' and not runtime.running:
            n_v, n_f = object_counts(context, obj)
            text = preflight.note(n_v, n_f, settings.field_resolution,
                                  256 if settings.surface_auto else settings.surface_resolution)
            if text:
                box = layout.box()
                box.alert = True
                box.label(text="Large object", icon='INFO')
                box.label(text=text)

        box = layout.box()
        box.label(text="Deform", icon='MOD_SIMPLEDEFORM')
        box.prop(settings, "stiffness")
        box.operator("isoclay.deform_shape", icon='PLAY')

        box = layout.box()
        box.label(text="Smooth", icon='MOD_SMOOTH')
        box.prop(settings, "smooth_strength")
        box.prop(settings, "creases")
        box.operator("isoclay.smooth_shape", icon='PLAY')

        box = layout.box()
        box.label(text="Sharpen", icon='SHARPCURVE')
        box.prop(settings, "sharpen_amount", slider=True)
        box.prop(settings, "sharpen_detect_radius")
        if not settings.sharpen_detect_radius:
            box.prop(settings, "sharpen_radius")
        box.operator("isoclay.sharpen_shape", icon='PLAY')

        row = layout.row(align=True)
        row.operator("isoclay.remesh_shape", icon='MOD_REMESH')
        row.prop(settings, "hole_fill", text="")
        col = layout.column()
        col.prop(settings, "field_resolution")
        col.prop(settings, "surface_auto")
        if not settings.surface_auto:
            col.prop(settings, "surface_resolution")
        col.prop(settings, "keep_topology")
        col.prop(settings, "closed_result")
        col.prop(settings, "keep_source_visible")

        if runtime.running:
            layout.progress(factor=runtime.progress, type='BAR',
                            text=f"{runtime.task}: {runtime.stage} {runtime.progress * 100:.0f}%")
            layout.operator("isoclay.cancel_edit", icon='CANCEL')
        elif runtime.stage:
            layout.label(text=f"Last: {runtime.task} {runtime.stage}")
        if runtime.message:
            layout.label(text=runtime.message)
        if runtime.notice:
            layout.label(text=runtime.notice, icon='INFO')
        if runtime.last_error:
            layout.label(text=runtime.last_error, icon='ERROR')
        if obj is not None and obj.type == 'MESH' and obj.isoclay.node_id:
            for note in list(obj.get("isoclay_notes", []))[:3]:
                layout.label(text=str(note), icon='INFO')
            draw_legend(layout, obj)


class ISOCLAY_UL_history(bpy.types.UIList):
    def draw_item(self, context, layout, data, item, icon, active_data, active_propname, index):
        in_scene = any(o.isoclay.node_id == item.node_id for o in context.view_layer.objects if o.type == 'MESH')
        row = layout.row(align=True)
        row.label(text=item.task, icon='RADIOBUT_ON' if item.current else 'RADIOBUT_OFF')
        row.label(text=item.summary)
        row.label(text=item.created)
        row.label(text=item.quality)
        row.label(text="", icon='OBJECT_DATA' if in_scene else 'BLANK1')


class ISOCLAY_PT_history(_SidebarPanel, bpy.types.Panel):
    bl_idname = "ISOCLAY_PT_history"
    bl_label = "History"
    bl_options = {'DEFAULT_CLOSED'}

    def draw(self, context):
        layout = self.layout
        runtime = context.window_manager.isoclay
        obj = context.active_object
        layout.operator("isoclay.refresh_history", icon='FILE_REFRESH')
        if obj is not None and runtime.history_key and source_key_of(obj) != runtime.history_key:
            layout.label(text="List shows another object: refresh", icon='INFO')
        layout.template_list("ISOCLAY_UL_history", "", runtime, "history", runtime, "history_index", rows=4)
        row = layout.row(align=True)
        row.operator("isoclay.bring_back", icon='DUPLICATE')
        row.operator("isoclay.edit_from_here", icon='FORWARD')
        if runtime.history_error:
            layout.label(text=runtime.history_error, icon='ERROR')


classes = (ISOCLAY_PT_solver, ISOCLAY_PT_handles, ISOCLAY_PT_edit, ISOCLAY_UL_history, ISOCLAY_PT_history)
