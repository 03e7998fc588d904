"""The extension builds with Blender's own builder, installs from its zip and registers."""

from __future__ import annotations

import os
import tomllib
import zipfile

import bpy
import pytest

from conftest import ADDON_MODULE, ROOT

# Tags Blender accepts for add-ons (the builder's own list, checked again by `validate` in the build).
EXPECTED_OPERATORS = ("deform_shape", "smooth_shape", "sharpen_shape", "remesh_shape", "cancel_edit", "add_handle",
                      "remove_handle", "clear_handles", "reset_targets", "refresh_history", "bring_back",
                      "edit_from_here", "start_solver", "stop_solver", "check_solver")


def test_zip_holds_wheels_and_solver_copies(addon_zip):
    with zipfile.ZipFile(addon_zip) as z:
        names = set(z.namelist())
        manifest = tomllib.loads(z.read("blender_manifest.toml").decode())
        for name in ("wire.py", "client.py", "summaries.py", "estimates.py"):
            with open(os.path.join(ROOT, "solver", "isoclay", name), "rb") as f:
                assert z.read(name) == f.read(), f"{name} in the zip differs from solver/isoclay/{name}"
    # the builder records the per-platform selection in [build.generated] (Blender's blender_ext.py)
    generated = manifest["build"]["generated"]
    assert generated["platforms"] == ["linux-x64"]
    wheels = generated["wheels"]
    assert any("pyzmq" in w and "manylinux" in w for w in wheels)
    assert any("msgpack" in w and "manylinux" in w for w in wheels)
    assert not any("win_amd64" in w or "macosx" in w for w in wheels), "linux zip must carry linux wheels only"
    for w in wheels:
        assert w[2:] in names, f"manifest lists {w} but the zip lacks it"
    # Blender extension manifest rules (Blender manual, "Extensions > Manifest"): identifier id,
    # tagline at most 64 characters without trailing punctuation, SPDX licence, known permissions.
    assert manifest["id"].isidentifier()
    assert len(manifest["tagline"]) <= 64 and manifest["tagline"][-1].isalnum()
    assert manifest["license"] == ["SPDX:GPL-3.0-or-later"]
    assert set(manifest["permissions"]) == {"network", "files"}
    assert tuple(int(x) for x in manifest["blender_version_min"].split(".")) >= (4, 2, 0)


def test_installed_addon_registers(addon):
    assert ADDON_MODULE in bpy.context.preferences.addons
    prefs = bpy.context.preferences.addons[ADDON_MODULE].preferences
    assert prefs.mode == "LOCAL"
    for op in EXPECTED_OPERATORS:
        assert hasattr(bpy.ops.isoclay, op), f"operator isoclay.{op} missing"
        assert bpy.ops.isoclay.__getattr__(op).idname() == f"ISOCLAY_OT_{op}"
    for panel in ("ISOCLAY_PT_solver", "ISOCLAY_PT_handles", "ISOCLAY_PT_edit", "ISOCLAY_PT_history"):
        cls = getattr(bpy.types, panel)
        assert cls.bl_space_type == 'VIEW_3D' and cls.bl_region_type == 'UI' and cls.bl_category == "Isoclay"
    # the bundled wheels are importable from Blender's extension site-packages
    import msgpack
    import zmq

    assert msgpack.version >= (1, 0, 0) and zmq.pyzmq_version()
    # status line starts honest
    assert addon.solver_process.LINK.status == "not configured"


def test_bad_solver_path_is_reported_not_raised(empty_scene, addon):
    prefs = bpy.context.preferences.addons[ADDON_MODULE].preferences
    prefs.mode = "LOCAL"
    prefs.python_path = os.path.join(ROOT, "no-such-python")
    prefs.module_path = ""
    # the operator reports an error (bpy.ops turns an ERROR report into RuntimeError for scripts)
    with pytest.raises(RuntimeError, match="no-such-python.*not an executable file"):
        bpy.ops.isoclay.start_solver()
    link = addon.solver_process.LINK
    assert link.status == "not configured"
    assert "no-such-python" in link.detail and "preferences" in link.detail


def test_shared_solver_without_file_is_not_configured(empty_scene, addon, tmp_path):
    prefs = bpy.context.preferences.addons[ADDON_MODULE].preferences
    prefs.mode = "SHARED"
    prefs.connection_file = str(tmp_path / "missing.json")
    try:
        with pytest.raises(RuntimeError, match="missing.json' not found"):
            bpy.ops.isoclay.start_solver()
        assert addon.solver_process.LINK.status == "not configured"
        assert "missing.json" in addon.solver_process.LINK.detail
    finally:
        prefs.mode = "LOCAL"


def test_every_icon_named_in_the_ui_exists(addon):
    # a wrong icon name raises only when a panel is drawn, which a headless Blender never does:
    # check the names against Blender's own icon list (UILayout.label's icon enum)
    import re

    valid = {item.identifier for item in bpy.types.UILayout.bl_rna.functions["label"].parameters["icon"].enum_items}
    used = set(addon.preferences.STATUS_ICONS.values())
    for name in ("panels.py", "preferences.py"):
        with open(os.path.join(os.path.dirname(addon.__file__), name)) as f:
            text = f.read()
        used |= set(re.findall(r"icon='([A-Z0-9_]+)'", text))
        used |= set(re.findall(r"icon='[A-Z0-9_]+' if [^\n]+ else '([A-Z0-9_]+)'", text))
    assert {"RADIOBUT_OFF", "BLANK1", "PLAY"} <= used  # conditional ones are found too: the check is not vacuous
    assert used <= valid, f"unknown icons: {sorted(used - valid)}"


def test_every_greyed_out_operator_says_why(empty_scene, addon):
    # Blender shows poll_message_set as the tooltip and puts it in the error scripts get
    def reason(op, **kwargs):
        with pytest.raises(RuntimeError) as err:
            getattr(bpy.ops.isoclay, op)(**kwargs)
        return str(err.value)

    addon.solver_process.LINK.stop()
    for op in ("deform_shape", "smooth_shape", "sharpen_shape", "remesh_shape"):
        assert "Select a mesh object to reshape" in reason(op)
    assert "Select a mesh, Tab into Edit Mode" in reason("add_handle")
    assert "Select a mesh, Tab into Edit Mode" in reason("remove_handle")
    assert "Select the mesh object whose handles to clear" in reason("clear_handles")
    assert "Select the mesh object whose target empties" in reason("reset_targets")
    assert "Select the mesh object whose edit history" in reason("refresh_history")
    assert "Select the object whose history entry" in reason("bring_back")
    assert "Select the object whose history entry" in reason("edit_from_here")
    assert "No edit is running" in reason("cancel_edit")
    assert "No solver is running" in reason("stop_solver")
    # a curve is not a mesh: the message names it
    bpy.ops.curve.primitive_bezier_curve_add()
    curve = bpy.context.active_object.name
    assert f"'{curve}' is a curve, not a mesh: select a mesh object" in reason("smooth_shape")
    # a mesh without handles cannot be deformed: the message says how to add one
    bpy.ops.mesh.primitive_cube_add()
    assert "'Cube' has no handles: select vertices in Edit Mode" in reason("deform_shape")
    assert "'Cube' has no target empties" in reason("reset_targets")
    assert "The history list is empty: press Refresh History" in reason("bring_back")
    # while an edit runs, another cannot start and the solver cannot be stopped under it
    addon.operators._Active.job = object()
    try:
        assert "Another edit is running" in reason("smooth_shape")
    finally:
        addon.operators._Active.job = None


def test_build_works_from_another_checkout_with_this_interpreter(tmp_path, addon_zip):
    # a checkout without .venv-blender: build.py finds Blender's builder through the running interpreter's bpy
    import shutil
    import subprocess
    import sys

    checkout = tmp_path / "elsewhere"
    shutil.copytree(os.path.join(ROOT, "addon"), checkout / "addon", ignore=shutil.ignore_patterns("__pycache__"))
    (checkout / "solver" / "isoclay").mkdir(parents=True)
    for name in ("wire.py", "client.py", "summaries.py", "estimates.py"):
        shutil.copyfile(os.path.join(ROOT, "solver", "isoclay", name), checkout / "solver" / "isoclay" / name)
    done = subprocess.run([sys.executable, str(checkout / "addon" / "build.py"), "--dist", str(tmp_path / "dist"),
                           "--cache", os.path.join(ROOT, "build", "wheels"), "--offline"],
                          capture_output=True, text=True, timeout=300, cwd=str(tmp_path))
    assert done.returncode == 0, done.stderr
    assert sorted(p.name for p in (tmp_path / "dist").iterdir()) == sorted(
        f"isoclay-0.1.0-{p}.zip" for p in ("linux_x64", "windows_x64", "macos_arm64", "macos_x64"))
