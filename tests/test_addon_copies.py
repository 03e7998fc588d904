"""The Blender add-on bundles the solver's wire schema and client verbatim, and they need no bpy or torch.

Runs in the solver environment. The staging step of addon/build.py is the part of the build that
copies the files; it runs here into a temporary folder (no wheels, no Blender needed).
"""

from __future__ import annotations

import importlib.util
import os
import shutil
import subprocess
import sys
import textwrap

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _build_module():
    spec = importlib.util.spec_from_file_location("isoclay_addon_build", os.path.join(ROOT, "addon", "build.py"))
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture()
def staged(tmp_path):
    build = _build_module()
    stage_dir = tmp_path / "isoclay_blender"
    build.stage(str(stage_dir), [])
    return stage_dir


def test_staged_copies_equal_the_solver_files(staged):
    for name in ("wire.py", "client.py", "summaries.py", "estimates.py"):
        with open(os.path.join(ROOT, "solver", "isoclay", name), "rb") as original:
            assert (staged / name).read_bytes() == original.read(), f"add-on copy of {name} differs"


def test_built_zip_copies_equal_the_solver_files():
    import glob
    import zipfile

    zips = glob.glob(os.path.join(ROOT, "dist", "isoclay-*.zip"))
    if not zips:
        pytest.skip("no built zips in dist/: run `python addon/build.py` (tests/blender builds its own)")
    for path in zips:
        with zipfile.ZipFile(path) as z:
            for name in ("wire.py", "client.py", "summaries.py", "estimates.py"):
                with open(os.path.join(ROOT, "solver", "isoclay", name), "rb") as original:
                    assert z.read(name) == original.read(), f"{name} in {os.path.basename(path)} is stale: rebuild"


def test_addon_client_imports_without_bpy_or_torch(staged):
    # bpy and torch are made unimportable: the client, wire, jobs and solver_process modules must not need them
    script = textwrap.dedent(f"""
        import importlib, importlib.abc, sys, types
        class Block(importlib.abc.MetaPathFinder):
            def find_spec(self, name, path, target=None):
                if name.split(".")[0] in ("bpy", "torch", "mathutils"):
                    raise ImportError(f"{{name}} is blocked in this test")
        sys.meta_path.insert(0, Block())
        package = types.ModuleType("addon_copy")
        package.__path__ = [{str(staged)!r}]
        sys.modules["addon_copy"] = package
        for name in ("wire", "client", "jobs", "solver_process", "summaries", "estimates", "messages", "preflight", "limits",
                     "colours"):
            importlib.import_module("addon_copy." + name)
        client = sys.modules["addon_copy.client"]
        assert issubclass(client.SolverUnreachable, client.ClientError)
        assert issubclass(client.KeyRejected, client.ClientError)
        assert sys.modules["addon_copy.wire"].PROTOCOL >= 1
        assert not [m for m in sys.modules if m.split(".")[0] in ("bpy", "torch")]
        print("ok")
    """)
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120,
                          env={k: v for k, v in os.environ.items() if k != "PYTHONPATH"})
    assert done.returncode == 0 and done.stdout.strip() == "ok", done.stderr[-2000:]


def test_stage_refuses_a_manifest_without_wheels_line(tmp_path, monkeypatch):
    build = _build_module()
    source = tmp_path / "source"
    shutil.copytree(build.SOURCE, source, ignore=shutil.ignore_patterns("__pycache__"))
    manifest = source / "blender_manifest.toml"
    manifest.write_text(manifest.read_text().replace("wheels = []", "# no wheels line"))
    monkeypatch.setattr(build, "SOURCE", str(source))
    with pytest.raises(build.BuildError, match="needs exactly one line `wheels = \\[\\]`"):
        build.stage(str(tmp_path / "stage"), [])


def test_stage_refuses_when_the_solver_file_is_missing(tmp_path, monkeypatch):
    build = _build_module()
    monkeypatch.setattr(build, "SOLVER", str(tmp_path / "nowhere"))
    with pytest.raises(build.BuildError, match="wire.py is missing"):
        build.stage(str(tmp_path / "stage"), [])
