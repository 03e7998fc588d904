"""Task name -> module with Config.from_params(params, normalization) and run(field, mesh, config, progress, should_stop)."""

from __future__ import annotations

import importlib

from ..errors import InvalidInput

#: Every task the command line and the service accept.
TASK_MODULES = {
    "remesh": "isoclay.tasks.remesh",
    "deform": "isoclay.tasks.deform",
    "smooth": "isoclay.tasks.smooth",
    "sharpen": "isoclay.tasks.sharpen",
    "decimate": "isoclay.tasks.decimate",
}


def task_module(name: str):
    module = TASK_MODULES.get(name)
    if module is None:
        raise InvalidInput(f"unknown task {name!r}: use one of {', '.join(sorted(TASK_MODULES))}")
    return importlib.import_module(module)
