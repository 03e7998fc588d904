"""Where a batch keeps finished work, by item key, so reruns and duplicates cost nothing.

Layout under the output folder:
    .isoclay-batch/results/<key>.ply    the result mesh of one item key (PLY keeps per-vertex values)
    .isoclay-batch/results/<key>.json   its record: written last, so its presence means "finished"
    .isoclay-batch/done.log             one line "<key> <worker> <pid>" per finished computation
The named outputs (``[output] name``) are published from the store by a hard link, or a copy
where links are not possible, each through a temporary name and a rename. Every write is temp
file + fsync + rename + fsync of the folder (a rename is durable only after both, FACTS.md), so
a killed worker or a power cut leaves either the whole file or none under its name.

An item key is the SHA-256 of the input file's bytes, the steps with their parameters, the fit
settings and STORE_FORMAT: change any of them and the item is computed again.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from pathlib import Path

from ..history.blobs import fsync_dir

#: Bump when the result files or records change meaning: old results are then recomputed.
STORE_FORMAT = 1
STORE_DIR = ".isoclay-batch"
#: Bytes read at a time when hashing inputs.
_CHUNK = 1 << 22


def file_hash(path: Path) -> str:
    """SHA-256 (64 hex) of a file's bytes: two byte-identical scans share it, whatever their names."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(_CHUNK):
            h.update(chunk)
    return h.hexdigest()


def item_key(input_hash: str, steps, fit: dict) -> str:
    """The item's identity: input content, every step's task and parameters in order, fit settings."""
    text = json.dumps({"format": STORE_FORMAT, "input": input_hash, "fit": fit,
                       "steps": [{"task": s.task, "params": s.params} for s in steps]}, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file in the same folder (fsync, rename, fsync folder)."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.partial")
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
        fsync_dir(path.parent)
    finally:
        if tmp.exists():
            tmp.unlink()


def atomic_json(path: Path, record: dict) -> None:
    atomic_write(path, (json.dumps(record, indent=2, sort_keys=True, allow_nan=True, default=str) + "\n").encode())


class ResultStore:
    """The finished results of one output folder (see the module docstring for the layout)."""

    def __init__(self, output_folder: Path):
        self.root = Path(output_folder) / STORE_DIR
        self.results = self.root / "results"

    def create(self) -> "ResultStore":
        self.results.mkdir(parents=True, exist_ok=True)
        return self

    def mesh_path(self, key: str) -> Path:
        return self.results / f"{key}.ply"

    def record_path(self, key: str) -> Path:
        return self.results / f"{key}.json"

    def finished(self, key: str) -> dict | None:
        """The record of a finished key whose mesh is intact (same size as recorded), else None."""
        try:
            record = json.loads(self.record_path(key).read_text())
            if record.get("key") != key or self.mesh_path(key).stat().st_size != record.get("mesh_bytes"):
                return None
            return record
        except (OSError, ValueError):
            return None

    def save(self, key: str, mesh, record: dict) -> dict:
        """Store a finished result (a TriangleMesh in world units): the mesh first, then its record
        (the record marks it finished), then a line in done.log."""
        from ..mesh.io import write_mesh

        self.create()
        path = self.mesh_path(key)
        write_mesh(path, mesh)  # temp file, fsync, rename
        fsync_dir(path.parent)
        record = {**record, "key": key, "mesh_bytes": path.stat().st_size}
        atomic_json(self.record_path(key), record)
        line = f"{key} {record.get('worker', '-')} {os.getpid()}\n".encode()
        fd = os.open(self.root / "done.log", os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:  # one short O_APPEND write: lines from several workers never interleave
            os.write(fd, line)
        finally:
            os.close(fd)
        return record

    def completions(self) -> list[str]:
        """Keys in done.log, one entry per finished computation (a key twice = computed twice)."""
        try:
            return [line.split()[0] for line in (self.root / "done.log").read_text().splitlines() if line.strip()]
        except OSError:
            return []

    def publish(self, key: str, output: Path) -> None:
        """Put the key's result under ``output`` (hard link or converted copy), atomically."""
        output.parent.mkdir(parents=True, exist_ok=True)
        source = self.mesh_path(key)
        tmp = output.with_name(f".{output.name}.{os.getpid()}.partial")
        try:
            if output.suffix.lower() == ".ply":
                try:
                    os.link(source, tmp)
                except OSError:  # another file system, or links not allowed: copy
                    shutil.copyfile(source, tmp)
                    with open(tmp, "rb+") as fh:
                        os.fsync(fh.fileno())
            else:
                from ..mesh.io import read_mesh, write_mesh

                write_mesh(tmp.with_suffix(output.suffix), read_mesh(source))
                os.replace(tmp.with_suffix(output.suffix), tmp)
            os.replace(tmp, output)
            fsync_dir(output.parent)
        finally:
            for leftover in (tmp, tmp.with_suffix(output.suffix)):
                if leftover.exists():
                    leftover.unlink()
