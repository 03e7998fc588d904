"""Operators: thin wrappers that gather input, start solver work and report problems."""

from __future__ import annotations

import time

import bpy
import numpy as np
from bpy.props import StringProperty

from . import handles, jobs, mesh_io, preflight, results, solver_process
from .messages import for_artist
from .preferences import configure_link, get_prefs
from .limits import MAX_RADIUS_REL, MAX_STRENGTH_REL
from .properties import ensure_source_key, source_key_of
from .summaries import describe_edit

TIMER_STEP_S = 0.1


class _Active:
    """The one edit running in this Blender session (the panel's Cancel button reaches it here)."""

    job: jobs.EditJob | None = None


def _redraw(context) -> None:
    screen = getattr(context, "screen", None)
    for area in (screen.areas if screen else ()):
        if area.type in ('VIEW_3D', 'PREFERENCES'):
            area.tag_redraw()


def ensure_solver(context) -> str:
    """Make sure a solver is there: start it from the preferences when it is not configured yet, and start a
    local one that died again when "Start when needed" is on. Returns a one-line notice ("" if nothing
    happened); raises SolverSetupError."""
    link = solver_process.LINK
    prefs = get_prefs(context)
    if link.died():
        reason = link.local.failure_message()
        if prefs.mode == "LOCAL" and prefs.start_automatically:
            link.restart()
            return f"{reason}; it was started again"
        raise solver_process.SolverSetupError(f"{reason}: press Start in the Isoclay panel's Solver box")
    if link.configured():
        return ""
    if prefs.mode == "LOCAL" and not prefs.start_automatically:
        raise solver_process.SolverSetupError("the local solver is not running: press Start in the Isoclay panel's Solver box")
    configure_link(prefs)
    return ""


def connector(context, timeout_s: float | None = None, retries: int = 3):
    """A callable for helper threads: waits for a starting solver, then returns a new client."""
    timeout = float(timeout_s if timeout_s is not None else get_prefs(context).timeout_s)
    link = solver_process.LINK

    def connect():
        deadline = time.monotonic() + 120.0
        while link.local is not None and not link.local.ready():
            if link.local.exit_code() is not None:
                raise solver_process.SolverSetupError(link.local.failure_message())
            if time.monotonic() > deadline:
                raise solver_process.SolverSetupError("the local solver did not start within 120 s: see its log")
            time.sleep(0.05)
        return link.make_client(timeout_s=timeout, retries=retries)

    return connect


def solver_gone() -> str:
    """Why the local solver is known to be dead, or "" (a shared solver is judged by its answers)."""
    local = solver_process.LINK.local
    if local is not None and local.exit_code() is not None:
        return f"the local solver stopped (exit code {local.exit_code()})"
    return ""


def _fail_poll(cls, reason: str) -> bool:
    """Greyed out, with `reason` as the tooltip (poll_message_set): say what to select or do."""
    cls.poll_message_set(reason)
    return False


def edit_unavailable(context) -> str:
    """Why no edit can start now, or ""."""
    obj = context.active_object
    if obj is None:
        return "Select a mesh object to reshape"
    if obj.type != 'MESH':
        return f"'{obj.name}' is a {obj.type.lower()}, not a mesh: select a mesh object"
    if _Active.job is not None:
        return "Another edit is running: wait for it to finish or cancel it"
    return ""


def mesh_unavailable(context, what: str) -> str:
    obj = context.active_object
    if obj is None or obj.type != 'MESH':
        return f"Select the mesh object {what}"
    return ""


def object_size(world: np.ndarray) -> float:
    """Longest side of the bounding box (world units): the solver's unit of relative limits."""
    return float(np.ptp(world, axis=0).max()) if len(world) else 0.0


class _EditOperator:
    """Shared by the edit operators: read the mesh, run a job without blocking, add the result."""

    bl_options = {'REGISTER', 'UNDO'}
    task = ""

    _job: jobs.EditJob | None = None
    _timer = None
    _source_name = ""
    _sent_local = None

    @classmethod
    def poll(cls, context):
        reason = edit_unavailable(context) or cls.unavailable(context)
        return _fail_poll(cls, reason) if reason else True

    @classmethod
    def unavailable(cls, context) -> str:
        """Why this edit in particular cannot start ("" when it can)."""
        return ""

    def task_params(self, context, obj, world) -> dict:
        """The task's parameters (world units); world : (n, 3) the evaluated mesh sent. Raises ValueError."""
        raise NotImplementedError

    def task_arrays(self, context, obj) -> dict:
        return {}

    def prepare(self, context) -> jobs.EditJob | None:
        obj = context.active_object
        runtime = context.window_manager.isoclay
        try:
            if obj.mode == 'EDIT':
                obj.update_from_editmode()
            depsgraph = context.evaluated_depsgraph_get()
            local, faces = mesh_io.read_local_mesh(obj, depsgraph)
            world = mesh_io.to_world(local, mesh_io.matrix_to_numpy(obj.matrix_world))
            params = self.task_params(context, obj, world)
            arrays = self.task_arrays(context, obj)
            parent = results.node_for_edit(obj, local, faces)
            notice = ensure_solver(context)
        except (mesh_io.MeshReadError, handles.HandleError, solver_process.SolverSetupError, ValueError) as exc:
            runtime.last_error = str(exc)
            self.report({'ERROR'}, str(exc))
            return None
        params["fit"] = {"resolution": int(context.scene.isoclay.field_resolution)}
        client_module = solver_process.LINK.client_module()
        job = jobs.EditJob(connector(context), client_module, self.task, params,
                           None if parent else world, None if parent else faces,
                           ensure_source_key(obj), parent_node=parent, solver_gone=solver_gone, arrays=arrays)
        self._source_name = obj.name
        self._sent_local = local
        runtime.running, runtime.task, runtime.stage, runtime.progress = True, self.task, "starting", 0.0
        runtime.last_error = ""
        runtime.message = describe_edit(self.task, params)
        runtime.notice = notice
        if notice:
            self.report({'INFO'}, notice)
        _Active.job = job
        return job.start()

    # scripts and headless use: blocks until the job ends
    def execute(self, context):
        job = self.prepare(context)
        if job is None:
            return {'CANCELLED'}
        try:
            job.wait(timeout_s=24 * 3600)
        except KeyboardInterrupt:
            job.cancel()
            job.wait(timeout_s=10)
        return self.finish(context, job)

    # interactive use: a timer polls the job; Esc cancels
    def invoke(self, context, event):
        job = self.prepare(context)
        if job is None:
            return {'CANCELLED'}
        self._job = job
        wm = context.window_manager
        self._timer = wm.event_timer_add(TIMER_STEP_S, window=context.window)
        wm.modal_handler_add(self)
        return {'RUNNING_MODAL'}

    def modal(self, context, event):
        try:
            return self._modal(context, event)
        except Exception as exc:  # never leave the add-on stuck "running" after an unexpected error
            self._job.cancel()
            self._end_modal(context)
            _Active.job = None
            context.window_manager.isoclay.running = False
            context.window_manager.isoclay.last_error = f"internal error during the {self.task}: {exc}"
            self.report({'ERROR'}, context.window_manager.isoclay.last_error)
            return {'CANCELLED'}

    def _end_modal(self, context):
        if self._timer is not None:
            context.window_manager.event_timer_remove(self._timer)
            self._timer = None
        if context.workspace is not None:
            context.workspace.status_text_set(None)

    def _modal(self, context, event):
        job = self._job
        if event.type == 'ESC' and event.value == 'PRESS':
            if not job.cancel_requested:
                job.cancel()
                self.report({'INFO'}, f"cancelling the {self.task}")
            return {'RUNNING_MODAL'}
        if event.type != 'TIMER':
            return {'PASS_THROUGH'}
        snap = job.poll()
        runtime = context.window_manager.isoclay
        runtime.stage, runtime.progress = snap.stage, max(0.0, min(1.0, snap.fraction))
        if context.workspace is not None:
            note = "cancelling" if job.cancel_requested else "Esc to cancel"
            context.workspace.status_text_set(
                f"Isoclay {self.task}: {snap.stage} {snap.fraction * 100:.0f}%  {snap.seconds:.0f} s  ({note})")
        _redraw(context)
        if not snap.finished:
            return {'PASS_THROUGH'}
        self._end_modal(context)
        return self.finish(context, job)

    def finish(self, context, job: jobs.EditJob):
        snap = job.poll()
        runtime = context.window_manager.isoclay
        runtime.running = False
        _Active.job = None
        _redraw(context)
        if snap.state == jobs.DONE:
            source = bpy.data.objects.get(self._source_name)
            if source is None:
                runtime.last_error = f"{self._source_name!r} was deleted during the edit; the result is kept in the history"
                self.report({'WARNING'}, runtime.last_error)
                return {'CANCELLED'}
            try:
                obj = results.create_result_object(context, source, job.record, self.task,
                                                   context.scene.isoclay.keep_source_visible, self._sent_local)
            except (mesh_io.MeshReadError, ValueError, TypeError, KeyError) as exc:
                runtime.last_error = f"could not build the result object: {exc}"
                self.report({'ERROR'}, runtime.last_error)
                return {'CANCELLED'}
            runtime.stage, runtime.progress = "done", 1.0
            runtime.message = f"{obj.name}: {len(obj.data.vertices)} vertices in {snap.seconds:.1f} s"
            for warning in (tuple(results.field_of(job.record, "warnings") or ()) + tuple(obj["isoclay_notes"]))[:4]:
                self.report({'WARNING'}, str(warning))
            self.report({'INFO'}, f"{self.task} finished: {runtime.message}")
            return {'FINISHED'}
        if snap.state == jobs.CANCELLED:
            runtime.stage, runtime.message = "cancelled", f"{self.task} cancelled; nothing was changed"
            self.report({'WARNING'}, runtime.message)
            return {'CANCELLED'}
        runtime.stage = snap.state
        runtime.last_error = snap.error or f"the {self.task} ended as {snap.state}"
        self.report({'ERROR'}, runtime.last_error)
        return {'CANCELLED'}


def _surface_params(settings, task: str) -> dict:
    """Output options every surface-producing task shares (CONTRACTS 3): keep_topology, resolution, closed."""
    out = {"keep_topology": bool(settings.keep_topology)}
    if not settings.surface_auto:
        out["resolution"] = int(settings.surface_resolution)
    if task in ("smooth", "sharpen") and settings.closed_result:
        out["closed"] = True
    return out


class ISOCLAY_OT_deform_shape(_EditOperator, bpy.types.Operator):
    """Pull the handles to their target empties; the rest of the shape follows elastically"""

    bl_idname = "isoclay.deform_shape"
    bl_label = "Deform"
    task = "deform"
    _arrays: dict = {}

    @classmethod
    def unavailable(cls, context):
        obj = context.active_object
        if handles.ATTRIBUTE not in obj.data.attributes:
            return f"'{obj.name}' has no handles: select vertices in Edit Mode and press Add Handle from Selection"
        return ""

    def task_params(self, context, obj, world):
        settings = context.scene.isoclay
        groups, self._arrays = handles.deform_request(obj)
        return {"groups": groups, "stiffness": settings.stiffness, **_surface_params(settings, self.task)}

    def task_arrays(self, context, obj):
        return self._arrays


class ISOCLAY_OT_smooth_shape(_EditOperator, bpy.types.Operator):
    """Even out bumps smaller than the strength while keeping creases and corners"""

    bl_idname = "isoclay.smooth_shape"
    bl_label = "Smooth"
    task = "smooth"

    def task_params(self, context, obj, world):
        settings = context.scene.isoclay
        size = object_size(world)
        strength = float(settings.smooth_strength)
        if strength > MAX_STRENGTH_REL * size:
            raise ValueError(f"Strength {strength:.4g} is too large for '{obj.name}' ({size:.4g} long): use at most "
                             f"{MAX_STRENGTH_REL * size:.4g}")
        params = {"strength": strength, **_surface_params(settings, self.task)}
        if settings.creases != "auto":
            params["creases"] = settings.creases
        return params


class ISOCLAY_OT_sharpen_shape(_EditOperator, bpy.types.Operator):
    """Crisp up creases and corners that have gone soft"""

    bl_idname = "isoclay.sharpen_shape"
    bl_label = "Sharpen"
    task = "sharpen"

    def task_params(self, context, obj, world):
        settings = context.scene.isoclay
        params = {"amount": float(settings.sharpen_amount), **_surface_params(settings, self.task)}
        if not settings.sharpen_detect_radius:
            size = object_size(world)
            radius = float(settings.sharpen_radius)
            if radius > MAX_RADIUS_REL * size:
                raise ValueError(f"Roundness {radius:.4g} is too large for '{obj.name}' ({size:.4g} long): use at "
                                 f"most {MAX_RADIUS_REL * size:.4g}, or tick Detect roundness")
            params["radius"] = radius
        return params


class ISOCLAY_OT_remesh_shape(_EditOperator, bpy.types.Operator):
    """Rebuild the surface as one clean, closed mesh through the fitted field"""

    bl_idname = "isoclay.remesh_shape"
    bl_label = "Rebuild Surface"
    task = "remesh"

    def task_params(self, context, obj, world):
        settings = context.scene.isoclay
        params = {"hole_fill": settings.hole_fill}
        if not settings.surface_auto:
            params["resolution"] = int(settings.surface_resolution)
        return params


class ISOCLAY_OT_cancel_edit(bpy.types.Operator):
    """Stop the running edit; the scene is left as it was"""

    bl_idname = "isoclay.cancel_edit"
    bl_label = "Cancel Edit"

    @classmethod
    def poll(cls, context):
        if _Active.job is None:
            return _fail_poll(cls, "No edit is running")
        if _Active.job.cancel_requested:
            return _fail_poll(cls, "Already cancelling: the solver is stopping the edit")
        return True

    def execute(self, context):
        _Active.job.cancel()
        context.window_manager.isoclay.stage = "cancelling"
        return {'FINISHED'}


# handles ------------------------------------------------------------------------------------------

class ISOCLAY_OT_add_handle(bpy.types.Operator):
    """Make the selected vertices a handle, with a target empty to move"""

    bl_idname = "isoclay.add_handle"
    bl_label = "Add Handle from Selection"
    bl_options = {'REGISTER', 'UNDO'}

    @classmethod
    def poll(cls, context):
        obj = context.active_object
        if obj is None or obj.type != 'MESH' or obj.mode != 'EDIT':
            return _fail_poll(cls, "Select a mesh, Tab into Edit Mode and select the vertices first")
        return True

    def execute(self, context):
        obj = context.active_object
        try:
            group = handles.add_handles(context, obj)
        except handles.HandleError as exc:
            self.report({'ERROR'}, str(exc))
            return {'CANCELLED'}
        self.report({'INFO'}, f"handle {group} added: move '{obj.name} target {group}' to pull it")
        return {'FINISHED'}


class ISOCLAY_OT_remove_handle(bpy.types.Operator):
    """Stop the selected vertices being handles (empties left without vertices are deleted)"""

    bl_idname = "isoclay.remove_handle"
    bl_label = "Remove Selected from Handles"
    bl_options = {'REGISTER', 'UNDO'}

    @classmethod
    def poll(cls, context):
        obj = context.active_object
        if obj is None or obj.type != 'MESH' or obj.mode != 'EDIT':
            return _fail_poll(cls, "Select a mesh, Tab into Edit Mode and select the vertices first")
        return True

    def execute(self, context):
        try:
            count = handles.remove_handles(context, context.active_object)
        except handles.HandleError as exc:
            self.report({'ERROR'}, str(exc))
            return {'CANCELLED'}
        self.report({'INFO'}, f"{count} vertices are no longer handles")
        return {'FINISHED'}


class ISOCLAY_OT_clear_handles(bpy.types.Operator):
    """Remove every handle of the active object and delete its target empties"""

    bl_idname = "isoclay.clear_handles"
    bl_label = "Clear Handles"
    bl_options = {'REGISTER', 'UNDO'}

    @classmethod
    def poll(cls, context):
        reason = mesh_unavailable(context, "whose handles to clear")
        return _fail_poll(cls, reason) if reason else True

    def execute(self, context):
        count = handles.clear_handles(context, context.active_object)
        self.report({'INFO'}, f"{count} handles cleared")
        return {'FINISHED'}


class ISOCLAY_OT_reset_targets(bpy.types.Operator):
    """Put every target empty of the active object back on its handle"""

    bl_idname = "isoclay.reset_targets"
    bl_label = "Reset Targets"
    bl_options = {'REGISTER', 'UNDO'}

    @classmethod
    def poll(cls, context):
        reason = mesh_unavailable(context, "whose target empties to put back")
        if not reason and not handles.target_empties(context.active_object):
            reason = f"'{context.active_object.name}' has no target empties: add a handle first"
        return _fail_poll(cls, reason) if reason else True

    def execute(self, context):
        obj = context.active_object
        import mathutils

        m_obj = obj.matrix_world
        for empty in handles.target_empties(obj).values():
            rest = empty.isoclay.target_rest
            empty.matrix_world = m_obj @ mathutils.Matrix([rest[0:4], rest[4:8], rest[8:12], rest[12:16]])
        return {'FINISHED'}


# history --------------------------------------------------------------------------------------------

def _format_time(value) -> str:
    if isinstance(value, (int, float)) and value > 0:
        return time.strftime("%H:%M %d %b", time.localtime(value))
    return str(value or "")[:16]


# Metrics worth a glance in the list, in order of preference: (name the solver reports, label, kind);
# only the first of each kind is shown.
QUALITY_KEYS = (("handle_error_max_rel", "handle err/diag", "handle"), ("handle_error_max", "handle err", "handle"),
                ("volume_change_rel", "volume", "volume"), ("volume_change", "volume", "volume"),
                ("stretch_mean", "stretch", "stretch"), ("bend_mean", "bend", "bend"),
                ("flipped_faces", "flipped", "flipped"), ("moved_max", "moved", "moved"))


def _quality(metrics: dict) -> str:
    parts, kinds = [], set()
    for key, label, kind in QUALITY_KEYS:
        if isinstance(metrics.get(key), (int, float)) and kind not in kinds:
            parts.append(f"{label} {metrics[key]:.3g}")
            kinds.add(kind)
    return ", ".join(parts[:3])


def fill_history(runtime, source_key: str, nodes: list) -> None:
    """Copy the solver's history nodes into the panel's list (newest first)."""
    runtime.history.clear()
    runtime.history_key = source_key
    for node in reversed(list(nodes)):
        item = runtime.history.add()
        item.node_id = str(node.get("id") or node.get("node_id") or "")
        item.parent = str(node.get("parent") or "")
        item.task = str(node.get("task") or "")
        item.summary = str(node.get("summary") or describe_edit(item.task, dict(node.get("params") or {})))
        item.created = _format_time(node.get("created"))
        item.quality = _quality(dict(node.get("metrics") or {}))
        item.current = bool(node.get("current"))


class _RequestOperator:
    """Runs one client call on a helper thread; modal when invoked, blocking from scripts."""

    _request: jobs.Request | None = None
    _timer = None

    def make_call(self, context):
        raise NotImplementedError

    def done(self, context, value):
        raise NotImplementedError

    def _start(self, context):
        try:
            notice = ensure_solver(context)
            call = self.make_call(context)
        except (solver_process.SolverSetupError, ValueError) as exc:
            self.report({'ERROR'}, str(exc))
            return None
        if notice:
            context.window_manager.isoclay.notice = notice
            self.report({'INFO'}, notice)
        return jobs.Request(connector(context, retries=1), solver_process.LINK.client_module(), call).start()

    def _end(self, context, request):
        if request.error:
            context.window_manager.isoclay.history_error = request.error
            self.report({'ERROR'}, request.error)
            return {'CANCELLED'}
        context.window_manager.isoclay.history_error = ""
        return self.done(context, request.value)

    def execute(self, context):
        request = self._start(context)
        if request is None:
            return {'CANCELLED'}
        request.wait(timeout_s=600.0)
        return self._end(context, request)

    def invoke(self, context, event):
        request = self._start(context)
        if request is None:
            return {'CANCELLED'}
        self._request = request
        self._timer = context.window_manager.event_timer_add(TIMER_STEP_S, window=context.window)
        context.window_manager.modal_handler_add(self)
        return {'RUNNING_MODAL'}

    def modal(self, context, event):
        if event.type != 'TIMER' or not self._request.poll():
            return {'PASS_THROUGH'}
        context.window_manager.event_timer_remove(self._timer)
        _redraw(context)
        return self._end(context, self._request)


class ISOCLAY_OT_refresh_history(_RequestOperator, bpy.types.Operator):
    """Ask the solver for the edits made from the active object"""

    bl_idname = "isoclay.refresh_history"
    bl_label = "Refresh History"

    @classmethod
    def poll(cls, context):
        reason = mesh_unavailable(context, "whose edit history to list")
        return _fail_poll(cls, reason) if reason else True

    def make_call(self, context):
        key = source_key_of(context.active_object) or ensure_source_key(context.active_object)
        self._key = key
        return lambda client: client.history(key)

    def done(self, context, value):
        fill_history(context.window_manager.isoclay, self._key, value or [])
        return {'FINISHED'}


def _selected_node(context) -> str:
    runtime = context.window_manager.isoclay
    if not (0 <= runtime.history_index < len(runtime.history)):
        raise ValueError("pick an entry in the history list first")
    return runtime.history[runtime.history_index].node_id


def _object_for_node(node_id: str):
    for obj in bpy.data.objects:
        if obj.type == 'MESH' and obj.isoclay.node_id == node_id:
            return obj
    return None


class ISOCLAY_OT_bring_back(_RequestOperator, bpy.types.Operator):
    """Create an object from the chosen history entry's result"""

    bl_idname = "isoclay.bring_back"
    bl_label = "Bring Back"
    bl_options = {'REGISTER', 'UNDO'}

    node_id: StringProperty(name="History entry", description="Leave empty for the entry chosen in the list")

    @classmethod
    def poll(cls, context):
        if context.active_object is None:
            return _fail_poll(cls, "Select the object whose history entry to use")
        if len(context.window_manager.isoclay.history) == 0:
            return _fail_poll(cls, "The history list is empty: press Refresh History")
        return True

    def make_call(self, context):
        node = self.node_id or _selected_node(context)
        self._node, self._source_name = node, context.active_object.name
        return lambda client: client.fetch_node(node)

    def done(self, context, record):
        source = bpy.data.objects.get(self._source_name)
        if source is None:
            self.report({'ERROR'}, "the object the history belongs to is gone")
            return {'CANCELLED'}
        runtime = context.window_manager.isoclay
        task = next((item.task for item in runtime.history if item.node_id == self._node), "") or "result"
        obj = results.create_result_object(context, source, record, task, keep_source_visible=True)
        self.report({'INFO'}, f"brought back {task} as {obj.name!r}")
        return {'FINISHED'}


class ISOCLAY_OT_edit_from_here(_RequestOperator, bpy.types.Operator):
    """Make the chosen history entry's result the active object; the next edit starts from its field"""

    bl_idname = "isoclay.edit_from_here"
    bl_label = "Edit from Here"
    bl_options = {'REGISTER', 'UNDO'}

    node_id: StringProperty(name="History entry", description="Leave empty for the entry chosen in the list")

    @classmethod
    def poll(cls, context):
        if context.active_object is None:
            return _fail_poll(cls, "Select the object whose history entry to use")
        if len(context.window_manager.isoclay.history) == 0:
            return _fail_poll(cls, "The history list is empty: press Refresh History")
        return True

    def execute(self, context):
        node = self.node_id
        if not node:
            try:
                node = _selected_node(context)
            except ValueError as exc:
                self.report({'ERROR'}, str(exc))
                return {'CANCELLED'}
        existing = _object_for_node(node)
        if existing is not None and existing.name in context.view_layer.objects:
            return self._activate(context, existing)
        self.node_id = node
        return _RequestOperator.execute(self, context)

    def invoke(self, context, event):
        node = self.node_id
        if not node:
            try:
                node = _selected_node(context)
            except ValueError as exc:
                self.report({'ERROR'}, str(exc))
                return {'CANCELLED'}
        existing = _object_for_node(node)
        if existing is not None and existing.name in context.view_layer.objects:
            return self._activate(context, existing)
        self.node_id = node
        return _RequestOperator.invoke(self, context, event)

    def _activate(self, context, obj):
        for other in context.view_layer.objects.selected:
            other.select_set(False)
        obj.hide_set(False)
        obj.select_set(True)
        context.view_layer.objects.active = obj
        obj.isoclay.base_node = obj.isoclay.node_id
        self.report({'INFO'}, f"next edit of {obj.name!r} starts from its history entry")
        return {'FINISHED'}

    def make_call(self, context):
        node = self.node_id
        self._node, self._source_name = node, context.active_object.name
        return lambda client: client.fetch_node(node)

    def done(self, context, record):
        source = bpy.data.objects.get(self._source_name)
        if source is None:
            self.report({'ERROR'}, "the object the history belongs to is gone")
            return {'CANCELLED'}
        runtime = context.window_manager.isoclay
        task = next((item.task for item in runtime.history if item.node_id == self._node), "") or "result"
        obj = results.create_result_object(context, source, record, task, keep_source_visible=True)
        return self._activate(context, obj)


# solver -----------------------------------------------------------------------------------------------

class ISOCLAY_OT_start_solver(bpy.types.Operator):
    """Start the local solver, or connect to the shared one, as set in the preferences"""

    bl_idname = "isoclay.start_solver"
    bl_label = "Start Solver"

    def execute(self, context):
        try:
            configure_link(get_prefs(context))
        except solver_process.SolverSetupError as exc:
            self.report({'ERROR'}, str(exc))
            return {'CANCELLED'}
        return {'FINISHED'}


class ISOCLAY_OT_stop_solver(bpy.types.Operator):
    """Stop the local solver (edits in its history are kept on disk)"""

    bl_idname = "isoclay.stop_solver"
    bl_label = "Stop Solver"

    @classmethod
    def poll(cls, context):
        if not solver_process.LINK.configured():
            return _fail_poll(cls, "No solver is running")
        if _Active.job is not None:
            return _fail_poll(cls, "An edit is running: cancel it first")
        return True

    def execute(self, context):
        solver_process.LINK.stop()
        return {'FINISHED'}


class ISOCLAY_OT_check_solver(bpy.types.Operator):
    """Ask the solver whether it is alive and accepts the add-on's key"""

    bl_idname = "isoclay.check_solver"
    bl_label = "Check Connection"

    def execute(self, context):
        link = solver_process.LINK
        if not link.configured():
            self.report({'WARNING'}, "no solver configured: set it in the add-on preferences")
            return {'CANCELLED'}
        link._last_ping = 0.0  # the next tick pings at once, on a helper thread
        link.tick()
        self.report({'INFO'}, f"solver {link.status}: {link.detail} (checking again)")
        return {'FINISHED'}


classes = (
    ISOCLAY_OT_deform_shape, ISOCLAY_OT_smooth_shape, ISOCLAY_OT_sharpen_shape, ISOCLAY_OT_remesh_shape,
    ISOCLAY_OT_cancel_edit,
    ISOCLAY_OT_add_handle, ISOCLAY_OT_remove_handle, ISOCLAY_OT_clear_handles, ISOCLAY_OT_reset_targets,
    ISOCLAY_OT_refresh_history, ISOCLAY_OT_bring_back, ISOCLAY_OT_edit_from_here,
    ISOCLAY_OT_start_solver, ISOCLAY_OT_stop_solver, ISOCLAY_OT_check_solver,
)
