"""Add-on preferences: which solver to use, and its status line."""

from __future__ import annotations

import bpy
from bpy.props import BoolProperty, EnumProperty, FloatProperty, StringProperty

from . import solver_process

STATUS_ICONS = {
    solver_process.NOT_CONFIGURED: 'QUESTION',
    solver_process.STARTING: 'SORTTIME',
    solver_process.CONNECTED: 'CHECKMARK',
    solver_process.UNREACHABLE: 'ERROR',
    solver_process.KEY_REJECTED: 'LOCKED',
    solver_process.STOPPED: 'CANCEL',
}


def get_prefs(context=None) -> "IsoclayPreferences":
    context = context or bpy.context
    return context.preferences.addons[__package__].preferences


def draw_status(layout) -> None:
    """The status line, shared by the preferences and the sidebar."""
    link = solver_process.LINK
    row = layout.row()
    row.label(text=f"Solver: {link.status}", icon=STATUS_ICONS.get(link.status, 'INFO'))
    if link.detail:
        layout.label(text=link.detail)


class IsoclayPreferences(bpy.types.AddonPreferences):
    bl_idname = __package__

    mode: EnumProperty(
        name="Solver",
        items=[
            ("LOCAL", "Launch on this computer", "Start the solver from its own Python environment; it stops with Blender"),
            ("SHARED", "Connect to a running solver", "Use a solver someone started, through the connection file it wrote"),
        ],
        default="LOCAL",
    )
    python_path: StringProperty(
        name="Solver Python", subtype='FILE_PATH',
        description="The python executable of the environment where the solver is installed")
    module_path: StringProperty(
        name="Solver source folder", subtype='DIR_PATH',
        description="Optional: a folder added to the solver's module path (the 'solver' folder of a source checkout)")
    data_dir: StringProperty(
        name="History folder", subtype='DIR_PATH',
        description="Optional: where the local solver keeps the edit history and fitted fields (default: its own)")
    connection_file: StringProperty(
        name="Connection file", subtype='FILE_PATH',
        description="The connection file written by the shared solver (keep it private: it holds the key)")
    start_automatically: BoolProperty(
        name="Start when needed", default=True,
        description="Launch the local solver on the first edit if it is not running")
    timeout_s: FloatProperty(
        name="Answer timeout", default=5.0, min=0.5, soft_max=60.0, subtype='TIME_ABSOLUTE', unit='TIME_ABSOLUTE',
        description="How long to wait for one answer from the solver before retrying")

    def draw(self, context):
        layout = self.layout
        layout.prop(self, "mode", expand=True)
        col = layout.column()
        if self.mode == "LOCAL":
            col.prop(self, "python_path")
            col.prop(self, "module_path")
            col.prop(self, "data_dir")
            col.prop(self, "start_automatically")
            row = col.row()
            row.operator("isoclay.start_solver", icon='PLAY')
            row.operator("isoclay.stop_solver", icon='PAUSE')
        else:
            col.prop(self, "connection_file")
            col.label(text="A solver reachable over a network must run in its authenticated mode.", icon='INFO')
            col.operator("isoclay.start_solver", text="Connect", icon='LINKED')
        col.prop(self, "timeout_s")
        box = layout.box()
        draw_status(box)
        box.operator("isoclay.check_solver", icon='FILE_REFRESH')


def configure_link(prefs) -> None:
    """Point the link at the solver the preferences describe (starts a local one)."""
    if prefs.mode == "LOCAL":
        solver_process.LINK.use_local(bpy.path.abspath(prefs.python_path),
                                      bpy.path.abspath(prefs.module_path) if prefs.module_path else "",
                                      bpy.path.abspath(prefs.data_dir) if prefs.data_dir else "")
    else:
        solver_process.LINK.use_shared(bpy.path.abspath(prefs.connection_file))


classes = (IsoclayPreferences,)
