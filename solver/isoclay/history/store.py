"""The edit history: nodes, jobs and per-object pointers in SQLite (WAL, synchronous=FULL).

Every finished edit is a node (id, parent, task, parameters, input hash, field checkpoints,
result blob, metrics, timestamps). A node is inserted in the same transaction that marks its
job done, so an acknowledged edit is durable and a job can never make two nodes (job_id is
UNIQUE). Undo and redo move the source's pointer; nothing is ever deleted. Only one process
(the server's message loop) writes; workers never open the database.
"""

from __future__ import annotations

import json
import os
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path

from ..errors import InvalidInput

FORMAT_VERSION = 1

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS meshes (
    mesh_hash TEXT PRIMARY KEY, blob TEXT NOT NULL, n_vertices INTEGER NOT NULL, n_faces INTEGER NOT NULL,
    created REAL NOT NULL);
CREATE TABLE IF NOT EXISTS jobs (
    job_id TEXT PRIMARY KEY, source_key TEXT NOT NULL, task TEXT NOT NULL, params TEXT NOT NULL,
    mesh_hash TEXT, base_node TEXT, parent TEXT NOT NULL, state TEXT NOT NULL, error TEXT,
    node_id TEXT, created REAL NOT NULL, updated REAL NOT NULL, attempts INTEGER NOT NULL DEFAULT 0);
CREATE TABLE IF NOT EXISTS nodes (
    node_id TEXT PRIMARY KEY, job_id TEXT NOT NULL UNIQUE, source_key TEXT NOT NULL, parent TEXT NOT NULL,
    task TEXT NOT NULL, params TEXT NOT NULL, input_hash TEXT NOT NULL, field_blob TEXT,
    result_field_blob TEXT, result_blob TEXT NOT NULL, metrics TEXT NOT NULL, report TEXT NOT NULL,
    warnings TEXT NOT NULL, created REAL NOT NULL, finished REAL NOT NULL);
CREATE INDEX IF NOT EXISTS nodes_by_source ON nodes (source_key, created);
CREATE TABLE IF NOT EXISTS pointers (source_key TEXT PRIMARY KEY, current TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS redo (source_key TEXT NOT NULL, parent TEXT NOT NULL, child TEXT NOT NULL,
    PRIMARY KEY (source_key, parent));
"""


@dataclass(frozen=True)
class JobRow:
    job_id: str
    source_key: str
    task: str
    params: dict
    mesh_hash: str | None
    base_node: str | None
    parent: str
    state: str
    error: str | None
    node_id: str | None
    created: float
    attempts: int


@dataclass(frozen=True)
class NodeRow:
    node_id: str
    job_id: str
    source_key: str
    parent: str
    task: str
    params: dict
    input_hash: str
    field_blob: str | None
    result_field_blob: str | None
    result_blob: str
    metrics: dict
    report: dict
    warnings: list
    created: float
    finished: float

    def summary(self, current: str) -> dict:
        return {"id": self.node_id, "parent": self.parent, "task": self.task, "params": self.params,
                "created": self.created, "finished": self.finished, "metrics": self.metrics,
                "job_id": self.job_id, "current": self.node_id == current}


class HistoryStore:
    """SQLite edit store; call from one thread."""

    def __init__(self, path):
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
        # SQLite gives its -wal and -shm files the database file's mode: make that 0600 before it opens
        os.close(os.open(self.path, os.O_RDWR | os.O_CREAT, 0o600))
        os.chmod(self.path, 0o600)
        self.db = sqlite3.connect(self.path, isolation_level=None, timeout=10.0, check_same_thread=False)
        self.db.execute("PRAGMA journal_mode=WAL")
        for side in ("-wal", "-shm"):  # files left by an older version, before the mode was set
            side_path = self.path.with_name(self.path.name + side)
            if side_path.exists():
                os.chmod(side_path, 0o600)
        self.db.execute("PRAGMA synchronous=FULL")
        self.db.executescript(_SCHEMA)
        row = self.db.execute("SELECT value FROM meta WHERE key='format'").fetchone()
        if row is None:
            self.db.execute("INSERT INTO meta VALUES ('format', ?)", (str(FORMAT_VERSION),))
        elif int(row[0]) != FORMAT_VERSION:
            raise InvalidInput(f"history database {self.path} has format {row[0]}, this solver reads "
                               f"{FORMAT_VERSION}: use a matching isoclay version or another --data-dir")

    def close(self) -> None:
        self.db.close()

    # ---------------------------------------------------------------- transactions

    def _tx(self):
        return _Transaction(self.db)

    # ---------------------------------------------------------------- meshes

    def add_mesh(self, mesh_hash: str, blob: str, n_vertices: int, n_faces: int) -> None:
        self.db.execute("INSERT OR IGNORE INTO meshes VALUES (?,?,?,?,?)", (mesh_hash, blob, n_vertices, n_faces,
                                                                           time.time()))

    def mesh_blob(self, mesh_hash: str, source_prefix: str = "") -> str | None:
        """The blob of an uploaded mesh; with source_prefix, only if a job of those sources used it."""
        if not source_prefix:
            row = self.db.execute("SELECT blob FROM meshes WHERE mesh_hash=?", (mesh_hash,)).fetchone()
        else:
            row = self.db.execute("SELECT blob FROM meshes m WHERE mesh_hash=? AND EXISTS (SELECT 1 FROM jobs j "
                                  "WHERE j.mesh_hash=m.mesh_hash AND substr(j.source_key, 1, ?)=?)",
                                  (mesh_hash, len(source_prefix), source_prefix)).fetchone()
        return row[0] if row else None

    def mesh_in_use(self, mesh_hash: str) -> bool:
        """True if a job that is not failed or cancelled, or a history node, started from this upload."""
        row = self.db.execute("SELECT EXISTS (SELECT 1 FROM jobs WHERE mesh_hash=? AND state NOT IN "
                              "('failed','cancelled')) OR EXISTS (SELECT 1 FROM nodes WHERE input_hash=?)",
                              (mesh_hash, mesh_hash)).fetchone()
        return bool(row[0])

    def unused_meshes(self) -> list[str]:
        """Uploads no live job (not failed or cancelled) and no node started from (e.g. left by a refused submit)."""
        rows = self.db.execute("SELECT mesh_hash FROM meshes m WHERE NOT EXISTS (SELECT 1 FROM jobs j WHERE "
                               "j.mesh_hash=m.mesh_hash AND j.state NOT IN ('failed','cancelled')) AND NOT EXISTS "
                               "(SELECT 1 FROM nodes n WHERE n.input_hash=m.mesh_hash)")
        return [r[0] for r in rows]

    def forget_mesh(self, mesh_hash: str) -> str | None:
        """Delete an upload's row (its blob file is the caller's); returns the blob it named, or None."""
        with self._tx():
            blob = self.mesh_blob(mesh_hash)
            self.db.execute("DELETE FROM meshes WHERE mesh_hash=?", (mesh_hash,))
        return blob

    # ---------------------------------------------------------------- jobs

    def create_job(self, job_id, source_key, task, params, mesh_hash, base_node) -> tuple[JobRow, bool]:
        """Insert a queued job unless the id exists; returns (row, created). Parent = explicit base or current."""
        with self._tx():
            existing = self.job(job_id)
            if existing is not None:
                return existing, False
            parent = base_node if base_node is not None else self.current(source_key)
            now = time.time()
            self.db.execute("INSERT INTO jobs VALUES (?,?,?,?,?,?,?,?,?,?,?,?,0)",
                            (job_id, source_key, task, json.dumps(params, sort_keys=True), mesh_hash, base_node,
                             parent, "queued", None, None, now, now))
        return self.job(job_id), True

    def job(self, job_id: str) -> JobRow | None:
        row = self.db.execute("SELECT job_id, source_key, task, params, mesh_hash, base_node, parent, state, error, "
                              "node_id, created, attempts FROM jobs WHERE job_id=?", (job_id,)).fetchone()
        if row is None:
            return None
        return JobRow(row[0], row[1], row[2], json.loads(row[3]), *row[4:])

    def set_job_state(self, job_id: str, state: str, error: str | None = None, count_attempt: bool = False) -> None:
        self.db.execute("UPDATE jobs SET state=?, error=?, updated=?, attempts=attempts+? WHERE job_id=?",
                        (state, error, time.time(), 1 if count_attempt else 0, job_id))

    def recover(self) -> list[str]:
        """After a restart: jobs that were queued or running become interrupted; returns their ids."""
        with self._tx():
            ids = [r[0] for r in self.db.execute("SELECT job_id FROM jobs WHERE state IN ('queued','running')")]
            self.db.execute("UPDATE jobs SET state='interrupted', error=?, updated=? WHERE state IN "
                            "('queued','running')", ("the solver stopped while this job ran: resubmit to resume",
                                                     time.time()))
        return ids

    def finish_job(self, job_id: str, node: dict) -> str:
        """Durably record a finished edit: insert its node, mark the job done, move the pointer. Returns node id."""
        with self._tx():
            job = self.job(job_id)
            if job.node_id:
                return job.node_id
            now = time.time()
            self.db.execute(
                "INSERT INTO nodes VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
                (node["node_id"], job_id, job.source_key, job.parent, job.task, json.dumps(job.params, sort_keys=True),
                 node["input_hash"], node.get("field_blob"), node.get("result_field_blob"), node["result_blob"],
                 json.dumps(node.get("metrics", {})), json.dumps(node.get("report", {})),
                 json.dumps(list(node.get("warnings", ()))), job.created, now))
            self.db.execute("UPDATE jobs SET state='done', error=NULL, node_id=?, updated=? WHERE job_id=?",
                            (node["node_id"], now, job_id))
            self._set_pointer(job.source_key, node["node_id"])
            self.db.execute("INSERT OR REPLACE INTO redo VALUES (?,?,?)", (job.source_key, job.parent, node["node_id"]))
        return node["node_id"]

    # ---------------------------------------------------------------- nodes and pointers

    def node(self, node_id: str) -> NodeRow | None:
        row = self.db.execute("SELECT * FROM nodes WHERE node_id=?", (node_id,)).fetchone()
        return _node(row) if row else None

    def nodes(self, source_key: str) -> list[NodeRow]:
        rows = self.db.execute("SELECT * FROM nodes WHERE source_key=? ORDER BY finished, rowid", (source_key,))
        return [_node(r) for r in rows]

    def current(self, source_key: str) -> str:
        row = self.db.execute("SELECT current FROM pointers WHERE source_key=?", (source_key,)).fetchone()
        return row[0] if row else ""

    def _set_pointer(self, source_key: str, node_id: str) -> None:
        self.db.execute("INSERT OR REPLACE INTO pointers VALUES (?,?)", (source_key, node_id))

    def undo(self, source_key: str) -> str:
        """Move the pointer to the current node's parent ("" = the original); remembers where to redo to."""
        with self._tx():
            cur = self.current(source_key)
            if not cur:
                return ""
            node = self.node(cur)
            parent = node.parent if node and node.source_key == source_key else ""
            self.db.execute("INSERT OR REPLACE INTO redo VALUES (?,?,?)", (source_key, parent, cur))
            self._set_pointer(source_key, parent)
        return parent

    def redo(self, source_key: str) -> str:
        """Move the pointer to the child last undone (else the newest child); stays put at a leaf."""
        with self._tx():
            cur = self.current(source_key)
            row = self.db.execute("SELECT child FROM redo WHERE source_key=? AND parent=?", (source_key, cur)).fetchone()
            child = row[0] if row else None
            if child is None:
                row = self.db.execute("SELECT node_id FROM nodes WHERE source_key=? AND parent=? ORDER BY finished DESC "
                                      "LIMIT 1", (source_key, cur)).fetchone()
                child = row[0] if row else None
            if child is None:
                return cur
            self._set_pointer(source_key, child)
        return child

    def checkout(self, source_key: str, node_id: str) -> str:
        if node_id:
            node = self.node(node_id)
            if node is None or node.source_key != source_key:
                raise InvalidInput(f"node {node_id} is not in the history of {source_key!r}: list it with history first")
        with self._tx():
            self._set_pointer(source_key, node_id)
        return node_id

    def integrity_check(self) -> str:
        return self.db.execute("PRAGMA integrity_check").fetchone()[0]

    def referenced_blobs(self) -> set[str]:
        """Every blob a row names: uploads, nodes' results and fields, handle blobs in stored parameters."""
        out = {r[0] for r in self.db.execute("SELECT blob FROM meshes")}
        for row in self.db.execute("SELECT field_blob, result_field_blob, result_blob FROM nodes"):
            out.update(b for b in row if b)
        for table in ("jobs", "nodes"):
            for (params,) in self.db.execute(f"SELECT params FROM {table} WHERE params LIKE '%handle_blob%'"):
                blob = json.loads(params).get("handle_blob")
                if isinstance(blob, str):
                    out.add(blob)
        return out


def _node(row) -> NodeRow:
    return NodeRow(row[0], row[1], row[2], row[3], row[4], json.loads(row[5]), row[6], row[7], row[8], row[9],
                   json.loads(row[10]), json.loads(row[11]), json.loads(row[12]), row[13], row[14])


class _Transaction:
    def __init__(self, db):
        self.db = db

    def __enter__(self):
        self.db.execute("BEGIN IMMEDIATE")

    def __exit__(self, kind, value, tb):
        self.db.execute("COMMIT" if kind is None else "ROLLBACK")
        return False
