"""The remesh task's parameter validator refuses bad input with one line each."""

import pytest

from isoclay.errors import InvalidInput
from isoclay.tasks.registry import task_module
from isoclay.tasks.remesh import Config


@pytest.mark.parametrize("params, words", [
    ([256], "must be a mapping"),
    ({"resolutoin": 128}, "unknown parameter(s) resolutoin"),
    ({"resolution": 8}, "out of range"),
    ({"resolution": 128.5}, "out of range"),
    ({"target_faces": -1}, "whole number"),
])
def test_bad_remesh_params(params, words):
    with pytest.raises(InvalidInput) as info:
        Config.from_params(params)
    assert words in str(info.value) and "\n" not in str(info.value)


def test_good_params_and_unknown_task():
    assert Config.from_params({"resolution": 64, "target_faces": 1000}) == Config(64, 1000)
    with pytest.raises(InvalidInput, match="unknown task 'melt'"):
        task_module("melt")
