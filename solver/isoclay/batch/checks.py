"""Checks of a plan's inputs and parameters before any work: what --dry-run prints, and the real run's gate.

Parameters are checked by each task's own Config.from_params with the input's normalisation
(lengths are in the mesh's units; a smoothing strength larger than the object is refused), every
step against the input's size (a remesh changes it by well under one percent, so the first
step's normalisation stands for the chain). Memory is the pre-flight estimate of work.memory_needed
against the workers' memory limit.
"""

from __future__ import annotations

from dataclasses import dataclass

from ..errors import IsoclayError
from .work import _gib, memory_needed


@dataclass(frozen=True)
class ItemCheck:
    """relative : the input as shown; problems : one line each; memory : estimated peak bytes (0 if unread);
    vertices, faces : input size (0 if unread)."""

    relative: str
    problems: tuple[str, ...]
    memory: int
    vertices: int
    faces: int


def check_item(item, memory_limit: int | None, pause: float = 0.8) -> ItemCheck:
    """Read one input and check every step's parameters and the memory it would need."""
    from ..mesh.io import read_mesh
    from ..pipeline import prepare_mesh
    from ..tasks.registry import task_module

    try:
        mesh = read_mesh(item.input)
        prepared = prepare_mesh(mesh, item.relative)
    except IsoclayError as exc:
        return ItemCheck(item.relative, (f"{item.relative}: {exc}",), 0, 0, 0)
    problems = []
    for i, step in enumerate(item.steps, 1):
        try:
            task_module(step.task).Config.from_params(dict(step.params), prepared.normalization)
        except IsoclayError as exc:
            problems.append(f"step {i} ({step.task}): {exc}")
    need = memory_needed(item.steps, item.fit, mesh.n_vertices, mesh.n_faces)
    if memory_limit and need > pause * memory_limit:
        problems.append(f"{item.relative}: needs about {_gib(need)} but a worker has {_gib(memory_limit)} "
                        f"(work pauses above {pause:.0%}): decimate the scan first, lower the resolutions or give the "
                        "workers more memory")
    return ItemCheck(item.relative, tuple(problems), need, mesh.n_vertices, mesh.n_faces)


def merge_problems(checks: list[ItemCheck]) -> list[str]:
    """One line per distinct problem; a parameter problem shared by several inputs names how many."""
    seen: dict[str, list[str]] = {}
    for check in checks:
        for line in check.problems:
            seen.setdefault(line, []).append(check.relative)
    lines = []
    for line, inputs in seen.items():
        if line.startswith(tuple(f"{name}:" for name in inputs)):
            lines.append(line)
        elif len(inputs) == 1:
            lines.append(f"{inputs[0]}: {line}")
        else:
            lines.append(f"{line} [{len(inputs)} inputs: {', '.join(inputs[:3])}{', ...' if len(inputs) > 3 else ''}]")
    return lines
