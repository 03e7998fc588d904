"""Every solver error an edit can meet reaches the artist in the add-on's words. Runs in the solver's environment.

The errors are produced by the solver's own code (tasks, validation, extraction, the service), not
copied here, so a change of wording in the solver that the add-on no longer recognises fails this test.
Reference: the add-on's controls as the panel names them (Strength, Amount, Field detail, Keep topology...).
"""

from __future__ import annotations

import numpy as np
import pytest
import trimesh

from isoclay.errors import IsoclayError
from isoclay.mesh.normalize import Normalization
from isoclay.mesh.types import TriangleMesh

from test_addon_limits import _addon

messages = _addon("messages")
UNIT = Normalization.of(np.array([[0.0, 0.0, 0.0], [2.0, 1.0, 1.0]]))
SOLVER_WORDS = ("--keep-topology", "params.", "unit box", "level set", "refit", "extraction box", "--memory-limit")


def _error(call) -> str:
    with pytest.raises(IsoclayError) as err:
        call()
    return str(err.value)


def _sphere(radius=0.3, centre=(0.0, 0.0, 0.0)):
    m = trimesh.creation.icosphere(subdivisions=2, radius=radius)
    return TriangleMesh(np.asarray(m.vertices) + centre, np.asarray(m.faces))


def _folded_lattice():
    from isoclay.warp.lattice import SplineLattice

    def box(p):
        q = np.abs(p) - 0.2
        return np.linalg.norm(np.maximum(q, 0), axis=1) + np.minimum(q.max(axis=1), 0)

    return SplineLattice.build(box, [-0.2] * 3, [0.2] * 3, 0.1)


def _solver_errors():
    from isoclay.extract import extract_mesh
    from isoclay.field.analytic import SphereSDF
    from isoclay.field.fit import FitConfig
    from isoclay.mesh.validate import validate_mesh
    from isoclay.service.crashes import Evidence, crash_reason
    from isoclay.tasks import deform, sharpen, smooth
    from isoclay.tasks.handles import check_on_surface

    far = SphereSDF(center=(5.0, 5.0, 5.0), radius=0.1)
    tiny = SphereSDF(center=(0.0, 0.0, 0.0), radius=0.05)
    yield "strength too large", _error(lambda: smooth.Config.from_params({"strength": 5.0}, UNIT)), "Strength"
    yield "amount out of range", _error(lambda: sharpen.Config.from_params({"amount": 2.0}, UNIT)), "Amount"
    yield "radius too large", _error(lambda: sharpen.Config.from_params({"amount": 0.5, "radius": 9.0}, UNIT)), "Roundness"
    yield "unknown setting", _error(lambda: deform.Config.from_params({"handles": [], "targets": [], "twist": 1}, UNIT)), "same isoclay version"
    yield "far handle", _error(lambda: check_on_surface(np.array([0.3]), 0.01, 2.0)), "Field detail"
    yield "fold", _error(lambda: deform._fold_check(_folded_lattice(), _folded_lattice().rest * [1, 1, -1], np.zeros((0, 3)), 1.0)), "handle"
    yield "stopped early", deform.summary_line({"converged": 0.0, "iterations": 40, "handle_error_max_rel": 0.01}), "deform again"
    yield "no surface", _error(lambda: extract_mesh(far, np.full(3, -0.5), np.full(3, 0.5), 16)), "gentler setting"
    yield "keep topology too far", _error(lambda: smooth.project_vertices(tiny, _sphere(0.45), "smooth")), "Keep topology"
    yield "absurd size", _error(lambda: validate_mesh(TriangleMesh(_sphere().vertices * 1e9, _sphere().faces))), "scale"
    bad = _sphere().vertices.copy()
    bad[3] = np.nan
    yield "nan vertex", _error(lambda: validate_mesh(TriangleMesh(bad, _sphere().faces))), "Edit Mode"
    yield "field detail", _error(lambda: FitConfig(resolution=4096).validated()), "Field detail"
    limit = 4 << 30
    yield "out of memory", crash_reason(-9, limit, Evidence(True, 300 << 20, 1)), "Field detail"
    yield "near the memory limit", crash_reason(-9, limit, Evidence(True, int(0.95 * limit), 0)), "Field detail"
    yield "killed from outside", crash_reason(-9, limit, Evidence(True, 300 << 20, 0)), "again"
    yield "cpu limit", crash_reason(-24, limit, Evidence(True)), "Field detail"


CASES = list(_solver_errors())


@pytest.mark.parametrize("case, text, control", CASES, ids=[c[0] for c in CASES])
def test_solver_errors_are_rewritten_for_the_artist(case, text, control):
    assert messages.rule_for(text) is not None, f"no rule for the solver's message: {text}"
    line = messages.for_artist(text, "smooth")
    assert control in line, line
    assert not any(word in line for word in SOLVER_WORDS), line
    assert "\n" not in line and len(line) < 300


def test_an_unknown_error_still_says_the_scene_is_unchanged():
    line = messages.for_artist("something nobody foresaw", "sharpen")
    assert line == "The sharpen did not finish (something nobody foresaw); the scene is unchanged"
