"""Starting and stopping the local solver the add-on's way, and the solver ending with Blender.

Kept apart from test_addon_solver.py: these tests start their own solvers through the add-on's one
SolverLink, which would otherwise stop that module's shared solver.
"""

from __future__ import annotations

import os
import shutil
import signal
import stat
import subprocess
import sys
import time

import bpy

from conftest import ADDON_MODULE, require_solver_environment, solver_source


def test_preferences_start_a_solver_that_dies_with_its_stdin(empty_scene, addon, tmp_path):
    python = require_solver_environment()
    prefs = bpy.context.preferences.addons[ADDON_MODULE].preferences
    prefs.mode, prefs.python_path = "LOCAL", python
    prefs.module_path, prefs.data_dir = solver_source(), str(tmp_path / "data")
    link = addon.solver_process.LINK
    assert bpy.ops.isoclay.start_solver() == {'FINISHED'}
    try:
        assert link.status == "starting"
        assert link.wait_ready(timeout_s=120) == "connected", link.detail
        process = link.local.process
        folder = link.local.folder
        # started with the working folder off sys.path (PYTHONSAFEPATH, Python 3.11+ -P)
        with open(f"/proc/{process.pid}/environ", "rb") as f:
            assert b"PYTHONSAFEPATH=1" in f.read().split(b"\0")
        assert stat.S_IMODE(os.stat(folder).st_mode) == 0o700
        # Blender going away closes the pipe: the solver must end by itself
        process.stdin.close()
        process.wait(timeout=15)
        assert process.returncode is not None
    finally:
        link.stop()
    assert link.status == "not configured" and not os.path.exists(folder)


def test_solver_ends_when_blender_is_killed(addon, tmp_path):
    python = require_solver_environment()
    # a stand-in for Blender: a Python process that starts the solver the add-on's way, then is killed
    script = f"""
import importlib.util, sys, time
spec = importlib.util.spec_from_file_location("solver_process", {addon.solver_process.__file__!r})
sp = importlib.util.module_from_spec(spec); spec.loader.exec_module(sp)
solver = sp.LocalSolver({python!r}, {solver_source()!r}, {str(tmp_path / "data")!r})
solver.start()
while not solver.ready():
    time.sleep(0.05)
print(solver.pid, solver.folder, flush=True)
time.sleep(600)
"""
    parent = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, text=True)
    try:
        line = parent.stdout.readline().split()
        assert line, "the stand-in could not start a solver"
        pid, folder = int(line[0]), line[1]
    finally:
        parent.kill()  # no cleanup runs: like Blender crashing
        parent.wait(timeout=10)
    deadline = time.monotonic() + 20
    while time.monotonic() < deadline and os.path.exists(f"/proc/{pid}"):
        with open(f"/proc/{pid}/stat") as f:
            if f.read().rsplit(")", 1)[1].split()[0] == "Z":
                break  # exited, waiting to be reaped by init
        time.sleep(0.1)
    alive = os.path.exists(f"/proc/{pid}")
    if alive:
        with open(f"/proc/{pid}/stat") as f:
            alive = f.read().rsplit(")", 1)[1].split()[0] != "Z"
    if alive:
        os.kill(pid, signal.SIGKILL)
    shutil.rmtree(folder, ignore_errors=True)  # nobody was left to remove the private folder
    assert not alive, "the solver outlived its parent"
