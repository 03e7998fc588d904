"""Build the Blender extension zips (one per platform) into dist/ and validate them.

    python addon/build.py [--dist DIR] [--cache DIR] [--offline] [--blender-ext PATH]

Steps: stage a copy of addon/isoclay_blender in build/stage/isoclay_blender; copy solver/isoclay/wire.py,
client.py, summaries.py and estimates.py into it verbatim; download the pyzmq and msgpack wheels for Blender's
Python 3.11 on each platform into a cache outside git (build/wheels); list them in the staged
manifest; run Blender's own extension builder (blender_ext.py, found inside the bpy package of the
interpreter running this script, else of this checkout's .venv-blender; it runs under plain
Python) with `build --split-platforms`, then `validate` on every zip.
Prints a JSON summary. Exit code 0 on success, 1 with a one-line message otherwise.
"""

from __future__ import annotations

import argparse
import glob
import json
import os
import re
import shutil
import subprocess
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SOURCE = os.path.join(ROOT, "addon", "isoclay_blender")
SOLVER = os.path.join(ROOT, "solver", "isoclay")
COPIED = ("wire.py", "client.py", "summaries.py", "estimates.py")  # copied verbatim; tests/test_addon_copies.py checks them

PYZMQ = "pyzmq==27.3.0"
MSGPACK = "msgpack==1.2.4"
# (requirement, pip --platform tag) for Blender's Python 3.11 (Blender 4.2 to 5.0)
WHEELS = (
    (PYZMQ, "manylinux_2_28_x86_64"),
    (MSGPACK, "manylinux_2_28_x86_64"),
    (PYZMQ, "win_amd64"),
    (MSGPACK, "win_amd64"),
    (PYZMQ, "macosx_10_15_universal2"),
    (MSGPACK, "macosx_11_0_arm64"),
    (MSGPACK, "macosx_10_9_x86_64"),
)


class BuildError(Exception):
    """The build cannot go on; the message says what to fix."""


BUILDER = os.path.join("scripts", "addons_core", "bl_pkg", "cli", "blender_ext.py")


def find_blender_ext() -> str:
    """Blender's extension builder, from the bpy package of the interpreter running this script
    (any checkout, any venv), else from this checkout's .venv-blender."""
    import importlib.util

    roots = []
    spec = importlib.util.find_spec("bpy")
    if spec is not None:
        roots += [os.path.dirname(spec.origin)] if spec.origin else list(spec.submodule_search_locations or ())
    roots += glob.glob(os.path.join(sys.prefix, "lib", "python3*", "site-packages", "bpy"))
    roots += glob.glob(os.path.join(sys.prefix, "Lib", "site-packages", "bpy"))
    roots += glob.glob(os.path.join(ROOT, ".venv-blender", "lib", "python3*", "site-packages", "bpy"))
    for root in roots:
        found = sorted(glob.glob(os.path.join(root, "*", BUILDER)))
        if found:
            return found[-1]
    raise BuildError(f"blender_ext.py not found: run this with a Python that has bpy installed (pip install "
                     f"bpy==5.0.1; this is {sys.executable}) or pass --blender-ext")


def _wheel_matches(filename: str, requirement: str, platform: str) -> bool:
    name, version = requirement.split("==")
    return filename.startswith(f"{name}-{version}-cp311-") and platform in filename


def fetch_wheels(cache: str, offline: bool) -> list[str]:
    """Paths of the cached wheels, downloading the missing ones with pip."""
    os.makedirs(cache, exist_ok=True)
    paths = []
    for requirement, platform in WHEELS:
        have = [f for f in os.listdir(cache) if f.endswith(".whl") and _wheel_matches(f, requirement, platform)]
        if not have:
            if offline:
                raise BuildError(f"no cached wheel for {requirement} on {platform} in {cache}: run without --offline")
            cmd = [sys.executable, "-m", "pip", "download", "--quiet", "--only-binary=:all:", "--no-deps",
                   "--platform", platform, "--python-version", "3.11", "--implementation", "cp",
                   "--dest", cache, requirement]
            done = subprocess.run(cmd, capture_output=True, text=True)
            if done.returncode != 0:
                tail = (done.stderr.strip().splitlines() or ["no output"])[-1]
                raise BuildError(f"pip could not download {requirement} for {platform}: {tail}")
            have = [f for f in os.listdir(cache) if f.endswith(".whl") and _wheel_matches(f, requirement, platform)]
            if not have:
                raise BuildError(f"pip downloaded no {platform} wheel for {requirement}: check the platform tag")
        paths.append(os.path.join(cache, sorted(have)[-1]))
    return sorted(set(paths))


def stage(stage_dir: str, wheels: list[str]) -> None:
    """A clean copy of the add-on with the solver's wire/client copies and the wheels listed."""
    if os.path.exists(stage_dir):
        shutil.rmtree(stage_dir)
    shutil.copytree(SOURCE, stage_dir, ignore=shutil.ignore_patterns("__pycache__", "*.pyc", "wheels"))
    for name in COPIED:
        src = os.path.join(SOLVER, name)
        if not os.path.isfile(src):
            raise BuildError(f"{src} is missing: the add-on bundles the solver's {name}")
        shutil.copyfile(src, os.path.join(stage_dir, name))
    os.makedirs(os.path.join(stage_dir, "wheels"))
    for path in wheels:
        shutil.copyfile(path, os.path.join(stage_dir, "wheels", os.path.basename(path)))
    manifest_path = os.path.join(stage_dir, "blender_manifest.toml")
    with open(manifest_path, encoding="utf-8") as f:
        manifest = f.read()
    listed = ",\n".join(f'  "./wheels/{os.path.basename(p)}"' for p in wheels)
    manifest, count = re.subn(r"^wheels = \[\]$", f"wheels = [\n{listed},\n]", manifest, flags=re.M)
    if count != 1:
        raise BuildError(f"{manifest_path} needs exactly one line `wheels = []` for the build to fill")
    with open(manifest_path, "w", encoding="utf-8") as f:
        f.write(manifest)


def run_ext(blender_ext: str, *args: str) -> str:
    done = subprocess.run([sys.executable, blender_ext, *args], capture_output=True, text=True)
    if done.returncode != 0:
        text = (done.stdout + done.stderr).strip().replace("\n", " | ")
        raise BuildError(f"blender_ext {args[0]} failed: {text[-600:]}")
    return done.stdout


def build(dist: str, cache: str, offline: bool = False, blender_ext: str | None = None) -> dict:
    blender_ext = blender_ext or find_blender_ext()
    wheels = fetch_wheels(cache, offline)
    stage_dir = os.path.join(ROOT, "build", "stage", "isoclay_blender")
    stage(stage_dir, wheels)
    run_ext(blender_ext, "validate", stage_dir)
    os.makedirs(dist, exist_ok=True)
    for old in glob.glob(os.path.join(dist, "isoclay-*.zip")):
        os.remove(old)
    run_ext(blender_ext, "build", "--source-dir", stage_dir, "--output-dir", dist, "--split-platforms")
    zips = sorted(glob.glob(os.path.join(dist, "isoclay-*.zip")))
    if not zips:
        raise BuildError(f"the extension builder wrote no zip into {dist}")
    for path in zips:
        run_ext(blender_ext, "validate", path)
    return {"stage": stage_dir, "zips": {os.path.basename(p): os.path.getsize(p) for p in zips},
            "wheels": [os.path.basename(p) for p in wheels]}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Build and validate the isoclay Blender extension zips.")
    parser.add_argument("--dist", default=os.path.join(ROOT, "dist"), help="output folder for the zips")
    parser.add_argument("--cache", default=os.path.join(ROOT, "build", "wheels"), help="wheel cache (outside git)")
    parser.add_argument("--offline", action="store_true", help="use cached wheels only")
    parser.add_argument("--blender-ext", default=None, help="path of Blender's blender_ext.py")
    args = parser.parse_args(argv)
    try:
        summary = build(os.path.abspath(args.dist), os.path.abspath(args.cache), args.offline, args.blender_ext)
    except BuildError as exc:
        sys.stderr.write(f"build: {exc}\n")
        return 1
    print(json.dumps(summary, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
