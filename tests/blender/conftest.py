"""Shared fixtures for the tests that run inside Blender (the bpy wheel in .venv-blender).

Run: .venv-blender/bin/python -m pytest -q tests/blender
Blender's user folders point at a temporary directory before bpy is first imported, so tests
never touch a real Blender configuration.
"""

from __future__ import annotations

import atexit
import os
import shutil
import subprocess
import sys
import tempfile

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

if "BLENDER_USER_RESOURCES" not in os.environ:
    _user = tempfile.mkdtemp(prefix="isoclay-blender-user-")
    os.environ["BLENDER_USER_RESOURCES"] = _user
    atexit.register(shutil.rmtree, _user, True)

ADDON_MODULE = "bl_ext.user_default.isoclay"


# ---------------------------------------------------------------- add-on (tests/blender/test_addon_*.py)

@pytest.fixture(scope="session")
def addon_zip(tmp_path_factory) -> str:
    """Build the per-platform zips with addon/build.py and return the linux-x64 one."""
    dist = tmp_path_factory.mktemp("dist")
    done = subprocess.run([sys.executable, os.path.join(ROOT, "addon", "build.py"), "--dist", str(dist)],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, f"addon/build.py failed: {done.stderr.strip()}"
    zips = sorted(p for p in os.listdir(dist) if p.endswith("-linux_x64.zip"))
    assert len(zips) == 1, f"expected one linux zip in {dist}, got {os.listdir(dist)}"
    return os.path.join(dist, zips[0])


@pytest.fixture(scope="session")
def addon(addon_zip):
    """The add-on installed from the linux zip and enabled; returns its package module."""
    import bpy

    # If bpy was imported before this file set BLENDER_USER_RESOURCES (tests/conftest.py imports it
    # first), Blender's "user_default" repository still points at the real user folder: redirect it.
    repo = next(r for r in bpy.context.preferences.extensions.repos if r.module == "user_default")
    repo.custom_directory = os.path.join(os.environ["BLENDER_USER_RESOURCES"], "extensions", "user_default")
    repo.use_custom_directory = True
    if ADDON_MODULE not in bpy.context.preferences.addons:
        bpy.ops.extensions.package_install_files(filepath=addon_zip, repo="user_default", enable_on_install=True)
    # the operator returns FINISHED even when installing failed: check the add-on list itself
    assert ADDON_MODULE in bpy.context.preferences.addons, "the isoclay extension did not register"
    return sys.modules[ADDON_MODULE]


@pytest.fixture()
def empty_scene(addon):
    """A fresh empty scene (add-ons stay enabled)."""
    import bpy

    bpy.ops.wm.read_homefile(use_empty=True)
    return bpy.context.scene


def solver_python() -> str:
    return os.environ.get("ISOCLAY_SOLVER_PYTHON", os.path.join(ROOT, ".venv", "bin", "python"))


def solver_source() -> str:
    """Folder put on the solver's module path (a source checkout's solver/; override for another copy)."""
    return os.environ.get("ISOCLAY_SOLVER_SOURCE", os.path.join(ROOT, "solver"))


def solver_tasks() -> set[str]:
    """Task names the solver offers (read from its registry; no torch needed)."""
    done = subprocess.run([solver_python(), "-c", "from isoclay.tasks.registry import TASK_MODULES; print(' '.join(TASK_MODULES))"],
                          capture_output=True, text=True, timeout=60, env={**os.environ, "PYTHONPATH": solver_source()})
    return set(done.stdout.split()) if done.returncode == 0 else set()


def solver_takes_handle_groups() -> str:
    """"" when the solver's deform reads the group form (CONTRACTS 1), else why not. Reads the task's source
    instead of importing it (that would import torch: seconds per run)."""
    path = os.path.join(solver_source(), "isoclay", "tasks", "deform.py")
    try:
        with open(path, encoding="utf-8") as f:
            text = f.read()
    except OSError:
        return f"{path} is missing"
    return "" if '"groups"' in text else f"{path} does not read \"groups\" yet"


SERVE_MISSING = ("the solver service is not there yet: solver/isoclay/commands/serve.py "
                 "(the `isoclay serve` subcommand) does not exist")


def require_solver_environment() -> str:
    if not os.path.isfile(os.path.join(solver_source(), "isoclay", "commands", "serve.py")):
        pytest.skip(SERVE_MISSING)
    python = solver_python()
    if not os.path.isfile(python):
        pytest.skip(f"no solver environment at {python}: create it with solver/setup.sh or set ISOCLAY_SOLVER_PYTHON")
    return python


@pytest.fixture(scope="module")
def solver(addon, tmp_path_factory):
    """A real `isoclay serve` process started by the add-on from the solver's environment.

    Its history lives in a temporary folder; echo's test knobs (delay, crash) are enabled.
    Preferences point at the same environment, so operators use this solver. Stopped afterwards.
    """
    import bpy

    python = require_solver_environment()
    data_dir = str(tmp_path_factory.mktemp("solver-data"))
    prefs = bpy.context.preferences.addons[ADDON_MODULE].preferences
    prefs.mode = "LOCAL"
    prefs.python_path = python
    prefs.module_path = solver_source()
    prefs.data_dir = data_dir
    prefs.timeout_s = 1.0
    link = addon.solver_process.LINK
    link.use_local(python, prefs.module_path, data_dir, ("--test-params",))
    status = link.wait_ready(timeout_s=120.0)
    assert status == "connected", f"solver did not come up: {status}: {link.detail}"
    yield link
    link.stop()
