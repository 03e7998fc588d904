"""The add-on asks for nothing the solver refuses, estimates what the solver estimates, and draws its
distortion view in a perceptually uniform colour map. Runs in the solver's environment.

References: the solver's own parameter checks (each range end accepted, just beyond refused);
isoclay.estimates.estimate_memory (the figure the service refuses jobs by); CIE 1976 L*a*b* with
the D65 white and the sRGB transfer function (IEC 61966-2-1) for the colour map's steps.
"""

from __future__ import annotations

import importlib.util
import os
import sys
import types

import numpy as np
import pytest

from isoclay.errors import InvalidInput
from isoclay.mesh.normalize import Normalization

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


_STAGED = {}


def _addon(name):
    """An add-on module that needs no bpy, from the add-on as addon/build.py stages it (with its solver copies)."""
    if "root" not in _STAGED:
        import tempfile

        spec = importlib.util.spec_from_file_location("isoclay_addon_build", os.path.join(ROOT, "addon", "build.py"))
        build = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(build)
        _STAGED["root"] = os.path.join(tempfile.mkdtemp(prefix="isoclay-addon-"), "isoclay_blender")
        build.stage(_STAGED["root"], [])
        package = types.ModuleType("isoclay_addon_src")
        package.__path__ = [_STAGED["root"]]
        sys.modules["isoclay_addon_src"] = package
    return importlib.import_module(f"isoclay_addon_src.{name}")


limits = _addon("limits")
UNIT = Normalization.of(np.array([[0.0, 0.0, 0.0], [2.0, 1.0, 1.0]]))  # longest side 2 world units


def _refused(call):
    with pytest.raises(InvalidInput):
        call()


def test_field_detail_range_is_the_solvers():
    from isoclay.field.fit import FitConfig

    lo, hi = limits.FIELD_DETAIL_RANGE
    for ok in (lo, hi):
        FitConfig(resolution=ok).validated()
    for bad in (lo - 1, hi + 1):
        _refused(lambda: FitConfig(resolution=bad).validated())


def test_surface_detail_and_sharpen_amount_ranges_are_the_solvers():
    from isoclay.tasks import remesh, sharpen

    lo, hi = limits.SURFACE_DETAIL_RANGE
    for ok in (lo, hi):
        remesh.Config.from_params({"resolution": ok}, UNIT)
    for bad in (lo - 1, hi + 1):
        _refused(lambda: remesh.Config.from_params({"resolution": bad}, UNIT))
    lo, hi = limits.SHARPEN_AMOUNT_RANGE
    for ok in (lo, hi):
        sharpen.Config.from_params({"amount": ok}, UNIT)
    _refused(lambda: sharpen.Config.from_params({"amount": hi + 1e-6}, UNIT))
    _refused(lambda: sharpen.Config.from_params({"amount": 0.0}, UNIT))


def test_relative_length_limits_are_the_solvers():
    from isoclay.tasks import sharpen, smooth

    size = 2.0
    smooth.Config.from_params({"strength": limits.MAX_STRENGTH_REL * size * 0.999}, UNIT)
    _refused(lambda: smooth.Config.from_params({"strength": limits.MAX_STRENGTH_REL * size * 1.001}, UNIT))
    sharpen.Config.from_params({"amount": 0.5, "radius": limits.MAX_RADIUS_REL * size * 0.999}, UNIT)
    _refused(lambda: sharpen.Config.from_params({"amount": 0.5, "radius": limits.MAX_RADIUS_REL * size * 1.001}, UNIT))


def test_stiffness_names_are_the_solvers():
    from isoclay.tasks.deform import STIFFNESS

    assert tuple(STIFFNESS) == limits.STIFFNESS_NAMES


def test_hole_fill_names_are_the_solvers():
    from isoclay.extract.hole_fill import FILL_MODES
    from isoclay.tasks import remesh

    assert limits.HOLE_FILL_MODES == FILL_MODES
    for mode in limits.HOLE_FILL_MODES:
        assert remesh.Config.from_params({"hole_fill": mode}, UNIT).hole_fill == mode


@pytest.mark.parametrize("task, n_v, n_f, fit", [("smooth", 504_000, 1_008_000, 128), ("deform", 3_000, 6_000, 256)])
def test_pre_flight_memory_is_the_solvers_estimate(task, n_v, n_f, fit):
    from isoclay.estimates import estimate_memory

    got = _addon("preflight").estimate(task, n_v, n_f, field_detail=fit).bytes
    assert got == estimate_memory(task, n_v, n_f, {"fit": {"resolution": fit}})


def _lab(srgb):
    """CIE 1976 L*a*b* (D65) of sRGB colours in [0, 1]."""
    c = np.asarray(srgb, dtype=np.float64)
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    m = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
    xyz = lin @ m.T / np.array([0.95047, 1.0, 1.08883])
    f = np.where(xyz > (6 / 29) ** 3, np.cbrt(xyz), xyz / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.stack([116 * f[:, 1] - 16, 500 * (f[:, 0] - f[:, 1]), 200 * (f[:, 1] - f[:, 2])], axis=1)


def test_distortion_colours_are_perceptually_uniform():
    # Kovesi (2015), "Good colour maps: how to design them": magnitude reads from lightness, so L* must
    # rise steadily (a rainbow's L* goes up and down: the check fails on one, see below)
    colours = _addon("colours")
    t = np.linspace(0.0, 1.0, 33)
    lightness = _lab(colours.ramp_srgb(t))[:, 0]
    steps = np.diff(lightness)
    assert (steps > 0).all() and lightness[0] < 25 and lightness[-1] > 85
    assert steps.max() <= 1.35 * steps.mean() and steps.min() >= 0.65 * steps.mean(), steps / steps.mean()
    rainbow = np.array([[0, 0, 0.5], [0, 0, 1], [0, 1, 1], [1, 1, 0], [1, 0, 0], [0.5, 0, 0]])
    jet = np.stack([np.interp(t, np.linspace(0, 1, 6), rainbow[:, c]) for c in range(3)], axis=1)
    assert (np.diff(_lab(jet)[:, 0]) < 0).any()  # the reference check does reject a rainbow
