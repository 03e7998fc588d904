"""Field checkpoints: weights + constructor config + format version, loadable with weights_only=True."""

from __future__ import annotations

import os
from pathlib import Path

import torch

from ..errors import InvalidInput
from . import analytic
from .base import SDFField
from .mlp import MLPSDF
from .sparse import SparseSplineSDF
from .spline import SplineSDF

#: 2: sparse fields (kind "sparse_spline": a coarse dense spline plus fine blocks). Version 1
#: files hold only kinds this version still builds the same way, so they load unchanged.
FORMAT_VERSION = 2
READABLE_VERSIONS = (1, 2)

#: kind -> class; modules defining new field kinds (e.g. warped fields) call register_field_kind.
FIELD_KINDS: dict[str, type] = {SplineSDF.kind: SplineSDF, SparseSplineSDF.kind: SparseSplineSDF, MLPSDF.kind: MLPSDF,
                                **analytic.ANALYTIC_KINDS}


def _register_warped() -> None:
    from ..warp.warped_field import WarpedSDF

    FIELD_KINDS[WarpedSDF.kind] = WarpedSDF


def register_field_kind(cls: type) -> type:
    """Make a field class loadable from checkpoints (usable as a class decorator)."""
    FIELD_KINDS[cls.kind] = cls
    return cls


def field_to_dict(field: SDFField) -> dict:
    """A plain dict of tensors, numbers and strings describing the field (nested fields allowed)."""
    return {"kind": field.kind, "config": field.config(), "state": {k: v.detach().cpu() for k, v in field.state_dict().items()}}


def field_from_dict(data: dict, load_state: bool = True) -> SDFField:
    if data.get("kind") == "warped" and "warped" not in FIELD_KINDS:
        _register_warped()
    cls = FIELD_KINDS.get(data.get("kind"))
    if cls is None:
        raise InvalidInput(f"checkpoint holds an unknown field kind {data.get('kind')!r}: update isoclay")
    config = data["config"]
    build = getattr(cls, "from_config", None)
    if "base_kind" in config:  # a field seen through a warp: rebuild the base first
        base = field_from_dict({"kind": config["base_kind"], "config": config["base"], "state": {}}, load_state=False)
        field = build(base, config)
    else:
        field = build(config) if build else cls(**config)
    if load_state:
        field.load_state_dict(data["state"])
    return field.eval()


def save_field(path: str | os.PathLike, field: SDFField, extra: dict | None = None) -> None:
    """Write atomically (temp file, fsync, rename) so a crash never leaves half a checkpoint."""
    path = Path(path)
    payload = {"format_version": FORMAT_VERSION, "field": field_to_dict(field), "extra": dict(extra or {})}
    tmp = path.with_name(f".{path.name}.partial")
    with open(tmp, "wb") as fh:
        torch.save(payload, fh)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def load_field(path: str | os.PathLike) -> tuple[SDFField, dict]:
    """(field, extra) from a checkpoint written by save_field."""
    path = Path(path)
    if not path.is_file():
        raise InvalidInput(f"{path}: no such field checkpoint")
    try:
        payload = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:
        raise InvalidInput(f"{path.name} is not an isoclay field checkpoint ({type(exc).__name__}): refit with `isoclay fit`") from None
    version = payload.get("format_version") if isinstance(payload, dict) else None
    if version not in READABLE_VERSIONS:
        newer = isinstance(version, int) and version > FORMAT_VERSION
        why = "written by a newer isoclay: update isoclay" if newer else "refit with `isoclay fit`"
        raise InvalidInput(f"{path.name} has checkpoint format {version!r}, this isoclay reads formats "
                           f"{', '.join(map(str, READABLE_VERSIONS))}: {why}")
    return field_from_dict(payload["field"]), payload.get("extra", {})
