#!/usr/bin/env bash
# Set up isoclay's two Python environments from a clean checkout (idempotent).
#   .venv          the solver (torch CPU build, numpy, scipy, libigl, trimesh, scikit-image, pyzmq, msgpack)
#   .venv-blender  Blender as a Python module (bpy 5.0.1), for the add-on tests, demo scene and renders
# Usage: bash solver/setup.sh [--tests]
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}

# System libraries the bpy wheel links against (X11/GL client libraries; no display needed).
need_apt=()
for pkg in libx11-6 libxrender1 libxxf86vm1 libxfixes3 libxi6 libxkbcommon0 libsm6 libice6 libgl1 libegl1; do
  dpkg -s "$pkg" >/dev/null 2>&1 || need_apt+=("$pkg")
done
if [ ${#need_apt[@]} -gt 0 ]; then
  if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
    echo "setup: installing system packages: ${need_apt[*]}"
    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "${need_apt[@]}" >/dev/null
  else
    echo "setup: please install these system packages (as root): ${need_apt[*]}" >&2
  fi
fi

if [ ! -x .venv/bin/python ]; then
  "$PY" -m venv .venv
fi
# torch first, pinned to the CPU build, so nothing later pulls a multi-GB CUDA build.
.venv/bin/python -m pip install -q --disable-pip-version-check "torch==2.13.0"
.venv/bin/python -m pip install -q --disable-pip-version-check -e ".[test]"

if [ ! -x .venv-blender/bin/python ]; then
  "$PY" -m venv .venv-blender
fi
.venv-blender/bin/python -m pip install -q --disable-pip-version-check "bpy==5.0.1" "numpy<2" msgpack pyzmq pytest

echo "setup: ok (.venv for the solver, .venv-blender for Blender)"
