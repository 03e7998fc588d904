"""The batch's account of itself: summary.csv (a row per input), a JSON report per item, batch.json.

summary.csv columns (COLUMNS): input (path as given, relative to the plan), status (done, reused,
failed, cancelled), output (result file relative to the output folder, empty when failed), worker
(the Dask worker's address that computed it), seconds (worker time spent on it in this run: 0 for
reused items), reason (one line, failures only), watertight, chamfer_rel (mean Chamfer distance to
the input over its bounding-box diagonal), volume_change (fraction; see volume_reference in the
item report), hausdorff_rel, vertices, faces, input_vertices, input_faces, same_as (the input whose
identical content was computed for this one), report (the item's JSON report), contact_sheet and
tile (the picture of the batch and this input's numbered tile on it).
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass, field
from pathlib import Path

from .store import atomic_json, atomic_write

COLUMNS = ("input", "status", "output", "worker", "seconds", "reason", "watertight", "chamfer_rel", "volume_change",
           "hausdorff_rel", "vertices", "faces", "input_vertices", "input_faces", "same_as", "report", "contact_sheet", "tile")
QUALITY = ("watertight", "chamfer_rel", "volume_change", "hausdorff_rel", "vertices", "faces", "input_vertices", "input_faces")


@dataclass
class Row:
    """One input's outcome; ``record`` is the stored record of its key (quality, steps) when there is one."""

    item: object  # plan.Item
    key: str
    status: str = "pending"
    worker: str = ""
    seconds: float = 0.0
    reason: str = ""
    same_as: str = ""
    record: dict = field(default_factory=dict)
    tile: int | None = None

    def values(self, folder: Path, contact_sheet: str) -> dict:
        quality = self.record.get("quality", {}) if self.status in ("done", "reused") else {}
        out = {
            "input": self.item.relative,
            "status": self.status,
            "output": _relative(self.item.output, folder) if self.status in ("done", "reused") else "",
            "worker": self.worker,
            "seconds": f"{self.seconds:.3f}",
            "reason": self.reason.replace("\n", " "),
            "same_as": self.same_as,
            "report": _relative(report_path(self.item, folder), folder),
            "contact_sheet": contact_sheet if self.tile is not None else "",
            "tile": "" if self.tile is None else str(self.tile),
        }
        for name in QUALITY:
            value = quality.get(name, "")
            out[name] = f"{value:.6g}" if isinstance(value, float) else str(value)
        return out


def _relative(path: Path, folder: Path) -> str:
    try:
        return path.relative_to(folder).as_posix()
    except ValueError:
        return str(path)


def report_path(item, folder: Path) -> Path:
    """The item's JSON report: <output folder>/reports/<output file stem>.json."""
    return folder / "reports" / f"{item.output.stem}.json"


def write_item_report(row: Row, folder: Path) -> None:
    path = report_path(row.item, folder)
    path.parent.mkdir(parents=True, exist_ok=True)
    atomic_json(path, {
        "input": str(row.item.input), "relative": row.item.relative, "status": row.status, "reason": row.reason,
        "output": str(row.item.output) if row.status in ("done", "reused") else None, "worker": row.worker,
        "seconds_this_run": row.seconds, "same_as": row.same_as or None, "key": row.key,
        "steps_planned": [{"task": s.task, "params": s.params} for s in row.item.steps], "fit": row.item.fit,
        **({"result": row.record} if row.record else {}),
    })


def write_summary(rows: list[Row], folder: Path, contact_sheet: str = "") -> Path:
    """Write summary.csv (atomically) and return its path."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=COLUMNS, lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow(row.values(folder, contact_sheet))
    path = folder / "summary.csv"
    atomic_write(path, buffer.getvalue().encode())
    return path


def read_summary(path: Path) -> list[dict]:
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def write_batch_record(folder: Path, record: dict) -> Path:
    path = folder / "batch.json"
    atomic_json(path, record)
    return path
