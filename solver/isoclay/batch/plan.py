"""A batch plan: which scans, which chain of steps, where the results go (PLAN.toml, read with tomllib).

    [inputs]
    paths = ["scans/*.ply", "extra/stone_07.obj"]   # files or globs (** for subfolders), relative to the plan
    exclude = ["scans/*_old.ply"]                  # optional

    [output]
    folder = "clean"                               # relative to the plan; created when missing
    name = "{stem}_clean.ply"                      # {stem} {name} {parent} {ext}; extension = file type
    contact_sheet = true                           # before/after thumbnails of the whole batch

    [fit]                                          # optional field-fit settings (as `isoclay fit`)
    resolution = 128

    [[steps]]                                      # a chain of registered tasks, parameters in the mesh's units
    task = "remesh"
    resolution = 256

    [[steps]]
    task = "smooth"
    strength = 0.5

    [[overrides]]                                  # per-pattern changes, later overrides win
    match = "large_*"                              # glob on the file name or on the path relative to the plan
    smooth = { strength = 1.0 }                    # merged into every step of that task
    fit = { resolution = 160 }
    skip = ["decimate"]                            # drop these tasks for matching inputs

    [cluster]                                      # the LocalCluster (ignored with --scheduler)
    workers = 2                                    # default: free cores
    memory_limit = "6 GiB"                         # per worker; default: the machine's memory / workers
    torch_threads = 1                              # per worker process

Structural problems (unknown sections, keys, tasks; wrong types; missing files) are collected,
one line each, so a plan is fixed in one round.
"""

from __future__ import annotations

import fnmatch
import glob
import re
import string
from dataclasses import dataclass
from pathlib import Path

from ..errors import InvalidInput
from ..field.fit import FitConfig
from ..mesh.io import FORMATS
from ..tasks.registry import TASK_MODULES

#: Sections and keys a plan may hold; anything else is reported (a typo would otherwise be ignored).
SECTIONS = {
    "inputs": {"paths", "exclude"},
    "output": {"folder", "name", "contact_sheet", "thumbnails"},
    "fit": None,  # FitConfig's fields
    "steps": None,
    "overrides": None,
    "cluster": {"workers", "memory_limit", "torch_threads"},
}
#: Fields the output name may use.
NAME_FIELDS = ("stem", "name", "parent", "ext")
#: Thumbnail renderers of the contact sheet (see contact_sheet.py).
RENDERERS = ("raster", "cycles")


class PlanError(InvalidInput):
    """A plan with problems; ``lines`` holds one line per problem (the message joins them)."""

    def __init__(self, lines: list[str]):
        self.lines = list(lines)
        super().__init__("; ".join(self.lines))


@dataclass(frozen=True)
class Step:
    """task : a name in tasks.registry.TASK_MODULES; params : as given in the plan (mesh units)."""

    task: str
    params: dict

    def describe(self) -> str:
        inner = ", ".join(f"{k}={v}" for k, v in sorted(self.params.items()))
        return f"{self.task}({inner})"


@dataclass(frozen=True)
class Override:
    match: str
    params: dict  # task name -> parameters merged into that task's steps
    fit: dict
    skip: tuple[str, ...]

    def matches(self, relative: str) -> bool:
        name = relative.rsplit("/", 1)[-1]
        return fnmatch.fnmatchcase(relative, self.match) or fnmatch.fnmatchcase(name, self.match)


@dataclass(frozen=True)
class Item:
    """One input of the batch: its file, where its result goes, its own chain and fit settings."""

    input: Path  # absolute
    relative: str  # as shown to the user (relative to the plan's folder when inside it)
    output: Path  # absolute
    steps: tuple[Step, ...]
    fit: dict


@dataclass(frozen=True)
class ClusterSettings:
    workers: int | None = None
    memory_limit: int | None = None  # bytes
    torch_threads: int = 1  # one per worker: on a shared CPU one thread per process is fastest (FACTS: oversubscription)


@dataclass(frozen=True)
class Plan:
    path: Path
    items: tuple[Item, ...]
    output_folder: Path
    contact_sheet: bool
    thumbnails: str
    cluster: ClusterSettings


def _toml():
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    return tomllib


def parse_size(text, where: str) -> int:
    """'6 GiB', '800MB', 4e9 -> bytes."""
    if isinstance(text, bool):
        raise InvalidInput(f"{where}: give a size such as \"6 GiB\", got {text!r}")
    if isinstance(text, (int, float)) and text > 0:
        return int(text)
    units = {"": 1, "b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12, "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40}
    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([a-zA-Z]*)\s*", str(text))
    if not m or m.group(2).lower() not in units or float(m.group(1)) <= 0:
        raise InvalidInput(f"{where}: give a size such as \"6 GiB\" or \"800 MB\", got {text!r}")
    return int(float(m.group(1)) * units[m.group(2).lower()])


def _check_fit(table, where: str, problems: list[str]) -> dict:
    if not isinstance(table, dict):
        problems.append(f"{where} must be a table of field-fit settings such as {{resolution = 128}}")
        return {}
    known = set(FitConfig.__dataclass_fields__)
    unknown = sorted(set(table) - known)
    if unknown:
        problems.append(f"{where}: unknown setting(s) {', '.join(unknown)}; known: {', '.join(sorted(known))}")
        return {}
    try:
        FitConfig(**table).validated()
    except InvalidInput as exc:
        problems.append(f"{where}: {exc}")
    except TypeError as exc:
        problems.append(f"{where}: {exc}")
    return dict(table)


def _check_output_name(name, problems: list[str]) -> str:
    if not isinstance(name, str) or not name:
        problems.append("[output] name must be a string such as \"{stem}_clean.ply\"")
        return "{stem}.ply"
    try:
        fields = [f for _, f, _, _ in string.Formatter().parse(name) if f is not None]
    except ValueError as exc:
        problems.append(f"[output] name {name!r}: {exc}")
        return "{stem}.ply"
    bad = [f for f in fields if f not in NAME_FIELDS]
    if bad:
        problems.append(f"[output] name {name!r}: unknown field {{{bad[0]}}}; use {', '.join('{' + f + '}' for f in NAME_FIELDS)}")
        return "{stem}.ply"
    suffix = Path(name.replace("{ext}", ".ply")).suffix.lower()
    if "{ext}" not in name and suffix not in FORMATS:
        problems.append(f"[output] name {name!r} must end in one of {', '.join(FORMATS)} (the file type of the results)")
    if "/" in name or "\\" in name:
        problems.append(f"[output] name {name!r} must be a file name, not a path: put folders in [output] folder")
    return name


def load_plan(path: str | Path, strict: bool = True):
    """Read and check a plan; raise PlanError listing every structural problem, one line each.

    strict=False returns (plan of the usable parts, problem lines) instead, so a dry run can go on
    to check the inputs and parameters too and report everything at once; the file itself must
    still be readable TOML."""
    path = Path(path)
    if not path.is_file():
        raise PlanError([f"{path}: no such plan file"])
    try:
        raw = _toml().loads(path.read_text())
    except UnicodeDecodeError:
        raise PlanError([f"{path.name}: not a text file; a plan is TOML"]) from None
    except Exception as exc:  # tomllib.TOMLDecodeError names line and column
        raise PlanError([f"{path.name}: not valid TOML ({exc})"]) from None
    return plan_from_dict(raw, path, strict)


def plan_from_dict(raw: dict, path: Path, strict: bool = True):
    problems: list[str] = []
    where = path.name
    base = path.resolve().parent
    for section in sorted(set(raw) - set(SECTIONS)):
        problems.append(f"{where}: unknown section [{section}]; known: {', '.join('[' + s + ']' for s in SECTIONS)}")
    for section, keys in SECTIONS.items():
        value = raw.get(section)
        if keys is not None and value is not None:
            if not isinstance(value, dict):
                problems.append(f"{where}: [{section}] must be a table")
                continue
            for key in sorted(set(value) - keys):
                problems.append(f"{where}: [{section}] unknown key {key!r}; known: {', '.join(sorted(keys))}")

    inputs = raw.get("inputs") if isinstance(raw.get("inputs"), dict) else {}
    patterns = inputs.get("paths")
    if isinstance(patterns, str):
        patterns = [patterns]
    if not patterns or not isinstance(patterns, list) or not all(isinstance(p, str) and p for p in patterns):
        problems.append(f"{where}: [inputs] paths must list files or globs, such as [\"scans/*.ply\"]")
        patterns = []
    exclude = inputs.get("exclude", [])
    if isinstance(exclude, str):
        exclude = [exclude]
    if not isinstance(exclude, list) or not all(isinstance(p, str) for p in exclude):
        problems.append(f"{where}: [inputs] exclude must list globs")
        exclude = []

    output = raw.get("output") if isinstance(raw.get("output"), dict) else {}
    folder = output.get("folder", "batch_out")
    if not isinstance(folder, str) or not folder:
        problems.append(f"{where}: [output] folder must be a folder name or path")
        folder = "batch_out"
    out_folder = (base / folder).resolve()
    name = _check_output_name(output.get("name", "{stem}.ply"), problems)
    contact_sheet = output.get("contact_sheet", True)
    if not isinstance(contact_sheet, bool):
        problems.append(f"{where}: [output] contact_sheet must be true or false")
        contact_sheet = True
    thumbnails = output.get("thumbnails", "raster")
    if thumbnails not in RENDERERS:
        problems.append(f"{where}: [output] thumbnails {thumbnails!r}: use one of {', '.join(repr(r) for r in RENDERERS)}")
        thumbnails = "raster"

    fit = _check_fit(raw.get("fit", {}), f"{where}: [fit]", problems)
    steps = _parse_steps(raw.get("steps"), where, problems)
    overrides = _parse_overrides(raw.get("overrides", []), where, problems)
    for o in overrides:
        for task in sorted(set(o.params) - {s.task for s in steps}):
            problems.append(f"{where}: override {o.match!r} sets {task} parameters but the plan has no {task} step")
    cluster = _parse_cluster(raw.get("cluster", {}), where, problems)

    files, missing = _expand_inputs(patterns, exclude, base, out_folder, where, problems)
    items = []
    outputs: dict[Path, str] = {}
    for file in files:
        relative = file.relative_to(base).as_posix() if file.is_relative_to(base) else str(file)
        item_steps, item_fit = _apply_overrides(steps, fit, overrides, relative, where, problems)
        ext = file.suffix
        out_name = name.format(stem=file.stem, name=file.name, parent=file.parent.name, ext=ext)
        if Path(out_name).suffix.lower() not in FORMATS:
            problems.append(f"{relative}: output name {out_name!r} is not a mesh file type; use one of {', '.join(FORMATS)}")
            continue
        out = out_folder / out_name
        if out in outputs:
            problems.append(f"{relative} and {outputs[out]} would both write {out.name}: use {{parent}} in [output] name")
            continue
        if out == file:
            problems.append(f"{relative}: the output name would overwrite the input; choose another [output] name or folder")
            continue
        outputs[out] = relative
        items.append(Item(file, relative, out, item_steps, item_fit))
    if patterns and not files and not missing and not problems:
        problems.append(f"{where}: [inputs] paths {', '.join(patterns)} match no file")
    plan = Plan(path.resolve(), tuple(items), out_folder, contact_sheet, thumbnails, cluster)
    if not strict:
        return plan, problems
    if problems:
        raise PlanError(problems)
    return plan


def _parse_steps(value, where: str, problems: list[str]) -> tuple[Step, ...]:
    if not isinstance(value, list) or not value:
        problems.append(f"{where}: no [[steps]]: give at least one, such as [[steps]] task = \"remesh\"")
        return ()
    steps = []
    for i, table in enumerate(value, 1):
        if not isinstance(table, dict) or not isinstance(table.get("task"), str):
            problems.append(f"{where}: step {i} has no task name: write task = \"remesh\" (or {', '.join(TASK_MODULES)})")
            continue
        task = table["task"]
        if task not in TASK_MODULES:
            problems.append(f"{where}: step {i}: unknown task {task!r}; use one of {', '.join(sorted(TASK_MODULES))}")
            continue
        steps.append(Step(task, {k: v for k, v in table.items() if k != "task"}))
    return tuple(steps)


def _parse_overrides(value, where: str, problems: list[str]) -> tuple[Override, ...]:
    if not isinstance(value, list):
        problems.append(f"{where}: overrides must be [[overrides]] tables")
        return ()
    out = []
    for i, table in enumerate(value, 1):
        if not isinstance(table, dict) or not isinstance(table.get("match"), str) or not table["match"]:
            problems.append(f"{where}: override {i} has no match pattern: write match = \"large_*\"")
            continue
        params, fit, skip = {}, {}, ()
        for key, val in table.items():
            if key == "match":
                continue
            if key == "fit":
                fit = _check_fit(val, f"{where}: override {i} fit", problems)
            elif key == "skip":
                if not isinstance(val, list) or not all(v in TASK_MODULES for v in val):
                    problems.append(f"{where}: override {i} skip must list task names ({', '.join(sorted(TASK_MODULES))})")
                else:
                    skip = tuple(val)
            elif key in TASK_MODULES:
                if not isinstance(val, dict):
                    problems.append(f"{where}: override {i} {key} must be a table such as {key} = {{...}}")
                else:
                    params[key] = dict(val)
            else:
                problems.append(f"{where}: override {i}: unknown key {key!r}; use match, fit, skip or a task name "
                                f"({', '.join(sorted(TASK_MODULES))})")
        out.append(Override(table["match"], params, fit, skip))
    return tuple(out)


def _parse_cluster(table, where: str, problems: list[str]) -> ClusterSettings:
    if not isinstance(table, dict):
        return ClusterSettings()
    workers = table.get("workers")
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or not 1 <= workers <= 256):
        problems.append(f"{where}: [cluster] workers {workers!r}: use a whole number from 1 to 256")
        workers = None
    memory = None
    if "memory_limit" in table:
        try:
            memory = parse_size(table["memory_limit"], f"{where}: [cluster] memory_limit")
        except InvalidInput as exc:
            problems.append(str(exc))
    threads = table.get("torch_threads", 1)
    if isinstance(threads, bool) or not isinstance(threads, int) or not 1 <= threads <= 256:
        problems.append(f"{where}: [cluster] torch_threads {threads!r}: use a whole number from 1 to 256")
        threads = 1
    return ClusterSettings(workers, memory, threads)


def _expand_inputs(patterns, exclude, base: Path, out_folder: Path, where: str, problems: list[str]):
    """Files matched by the patterns, in order, each once; and the plain (non-glob) paths that do not exist
    (each also a problem line)."""
    files: list[Path] = []
    seen: set[Path] = set()
    missing: list[str] = []
    for pattern in patterns:
        full = pattern if Path(pattern).is_absolute() else str(base / pattern)
        if glob.has_magic(pattern):
            matched = sorted(Path(p).resolve() for p in glob.glob(full, recursive=True))
        else:
            matched = [Path(full).resolve()]
            if not matched[0].is_file():
                missing.append(pattern)
                problems.append(f"{where}: input {pattern}: no such file")
                continue
        for file in matched:
            if not file.is_file() or file in seen or file.is_relative_to(out_folder):
                continue
            if file.suffix.lower() not in FORMATS:
                if not glob.has_magic(pattern):
                    problems.append(f"{where}: input {pattern}: unsupported file type {file.suffix or '(none)'}; "
                                    f"use one of {', '.join(FORMATS)}")
                continue
            rel = file.relative_to(base).as_posix() if file.is_relative_to(base) else str(file)
            if any(fnmatch.fnmatchcase(rel, x) or fnmatch.fnmatchcase(file.name, x) for x in exclude):
                continue
            seen.add(file)
            files.append(file)
    return files, missing


def _apply_overrides(steps, fit, overrides, relative: str, where: str, problems: list[str]):
    item_fit = dict(fit)
    merged = [dict(s.params) for s in steps]
    skip: set[str] = set()
    for o in overrides:
        if not o.matches(relative):
            continue
        item_fit.update(o.fit)
        skip |= set(o.skip)
        for task, params in o.params.items():
            for s, m in zip(steps, merged):
                if s.task == task:
                    m.update(params)
    chain = tuple(Step(s.task, m) for s, m in zip(steps, merged) if s.task not in skip)
    if steps and not chain:
        problems.append(f"{relative}: overrides skip every step; remove it from [inputs] instead")
    return chain, item_fit
