"""Shared test set-up: one torch thread, passive OpenMP waiting, no denormals; Blender tests apart."""

import os
import sys

import tempfile

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
# Blender reads its user folders when bpy is imported: keep tests away from ~/.config/blender
os.environ.setdefault("BLENDER_USER_RESOURCES", tempfile.mkdtemp(prefix="isoclay-blender-user-"))

try:  # the Blender tests run in .venv-blender (bpy), the rest in .venv (torch)
    import bpy  # noqa: F401

    IN_BLENDER = True
except ImportError:
    IN_BLENDER = False

collect_ignore = [] if IN_BLENDER else ["blender"]

if not IN_BLENDER:
    import torch

    torch.set_num_threads(1)
    torch.set_flush_denormal(True)

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
if os.path.join(ROOT, "solver") not in sys.path:
    sys.path.insert(0, os.path.join(ROOT, "solver"))
