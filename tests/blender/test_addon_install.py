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
        for name in ("wire.py", "client.py"):
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
