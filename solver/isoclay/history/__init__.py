"""Edit history that never loses work: SQLite (WAL) nodes plus content-addressed blob files."""

from .blobs import BlobStore, pack_mesh, unpack_mesh
from .store import HistoryStore, JobRow, NodeRow

__all__ = ["BlobStore", "HistoryStore", "JobRow", "NodeRow", "pack_mesh", "unpack_mesh"]
