"""Isoclay for Blender: reshape meshes through a signed-distance field fitted by an external solver.

Registration only. The solver lives in its own Python environment; see docs/addon.md.
"""

from __future__ import annotations

import bpy
from bpy.app.handlers import persistent

from . import operators, panels, preferences, properties, solver_process

_modules = (properties, preferences, operators, panels)
_TICK_S = 1.0


def _tick():
    """Keeps the status line current (UI only: timers do not run in a headless Blender)."""
    before = solver_process.LINK.status
    if solver_process.LINK.tick() != before:
        for window in getattr(bpy.context.window_manager, "windows", ()):
            for area in window.screen.areas:
                if area.type in ('VIEW_3D', 'PREFERENCES'):
                    area.tag_redraw()
    return _TICK_S


@persistent
def _on_undo_redo(*_args):
    # an undo to a state before an edit wrote the source's history key must not cut it off its history
    properties.restore_source_keys()


@persistent
def _on_load_pre(*_args):
    # the objects a running edit refers to are about to disappear: stop it (the solver keeps nothing half-done)
    job = operators._Active.job
    if job is not None:
        job.cancel()
        operators._Active.job = None


def register():
    for module in _modules:
        for cls in module.classes:
            bpy.utils.register_class(cls)
    properties.register_properties()
    bpy.app.handlers.load_pre.append(_on_load_pre)
    for handlers in (bpy.app.handlers.undo_post, bpy.app.handlers.redo_post):
        handlers.append(_on_undo_redo)
    if not bpy.app.timers.is_registered(_tick):
        bpy.app.timers.register(_tick, first_interval=_TICK_S, persistent=True)


def unregister():
    if bpy.app.timers.is_registered(_tick):
        bpy.app.timers.unregister(_tick)
    if _on_load_pre in bpy.app.handlers.load_pre:
        bpy.app.handlers.load_pre.remove(_on_load_pre)
    for handlers in (bpy.app.handlers.undo_post, bpy.app.handlers.redo_post):
        if _on_undo_redo in handlers:
            handlers.remove(_on_undo_redo)
    panels.free_swatches()
    job = operators._Active.job
    if job is not None:
        job.cancel()
        operators._Active.job = None
    solver_process.LINK.stop()
    properties.unregister_properties()
    for module in reversed(_modules):
        for cls in reversed(module.classes):
            bpy.utils.unregister_class(cls)
