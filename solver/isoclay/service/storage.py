"""The data folder's size: uploads of refused or failed jobs removed, unreferenced blobs collected, a cap.

History blobs are the artist's work and are never evicted; what the cap may remove are cached
fields (cache/*.pt, least recently used first: a hit refreshes the file's time), which a later
edit only refits. An upload that cannot fit even with the cache empty is refused at submit.
Runs in the server's message loop (one thread); torch-free.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

from ..bounds import shown_bytes
from ..errors import InvalidInput
from ..history.blobs import BlobStore
from ..history.store import HistoryStore

#: Blob files younger than this are never collected: another solver sharing the folder by mistake
#: may be about to commit them (a worker commits within milliseconds of writing).
COLLECT_GRACE_S = 600.0


def folder_bytes(root: Path) -> int:
    """Bytes of every file under root (sizes as stat reports them)."""
    total = 0
    stack = [str(root)]
    while stack:
        try:
            with os.scandir(stack.pop()) as it:
                for entry in it:
                    try:
                        if entry.is_dir(follow_symlinks=False):
                            stack.append(entry.path)
                        elif entry.is_file(follow_symlinks=False):
                            total += entry.stat(follow_symlinks=False).st_size
                    except OSError:
                        continue
        except OSError:
            continue
    return total


class DataFolder:
    """root : the data folder; max_bytes : its cap (--data-limit)."""

    def __init__(self, root, store: HistoryStore, blobs: BlobStore, cache_root, max_bytes: int):
        self.root = Path(root)
        self.store = store
        self.blobs = blobs
        self.cache_root = Path(cache_root)
        self.max_bytes = int(max_bytes)
        self.stats = {"uploads_removed": 0, "blobs_collected": 0, "bytes_collected": 0, "cache_evicted": 0}

    def usage(self) -> int:
        return folder_bytes(self.root)

    def cache_entries(self) -> list[tuple[Path, int, float]]:
        """(path, bytes, last use) of each cached field, least recently used first."""
        out = []
        for path in self.cache_root.glob("*.pt"):
            if path.name.startswith(".tmp-"):
                continue
            try:
                st = path.stat()
            except FileNotFoundError:
                continue
            out.append((path, st.st_size, st.st_mtime))
        return sorted(out, key=lambda e: e[2])

    def fit(self, incoming: int = 0) -> bool:
        """Evict cached fields, least recently used first, until usage + incoming fits the cap; True if it does."""
        used = self.usage()
        for path, size, _ in self.cache_entries():
            if used + incoming <= self.max_bytes:
                break
            path.unlink(missing_ok=True)
            used -= size
            self.stats["cache_evicted"] += 1
        return used + incoming <= self.max_bytes

    def require_room(self, incoming: int) -> None:
        """InvalidInput (one line) unless ``incoming`` more bytes fit under the cap (after evicting cached fields)."""
        if not self.fit(incoming):
            raise InvalidInput(f"the solver's data folder holds {shown_bytes(self.usage())} of the "
                               f"{shown_bytes(self.max_bytes)} it may use (--data-limit), too little for "
                               f"{shown_bytes(incoming)} more: raise --data-limit or give the solver another --data-dir")

    def forget_upload(self, mesh_hash: str | None) -> bool:
        """Remove an uploaded mesh that only refused, failed or cancelled jobs used; True if removed."""
        if mesh_hash is None or self.store.mesh_in_use(mesh_hash):
            return False
        blob = self.store.forget_mesh(mesh_hash)
        if blob is None:
            return False
        if blob not in self.store.referenced_blobs():
            self.blobs.path(blob).unlink(missing_ok=True)
        self.stats["uploads_removed"] += 1
        return True

    def collect(self, now: float | None = None) -> dict:
        """Forget uploads nothing uses, then delete blob files that no row names (older than
        COLLECT_GRACE_S); returns counts.

        Call only when no worker runs: a worker's result is referenced once the server commits it.
        """
        now = time.time() if now is None else now
        for mesh_hash in self.store.unused_meshes():  # e.g. uploads an older solver kept for refused submits
            self.forget_upload(mesh_hash)
        referenced = self.store.referenced_blobs()
        removed = freed = 0
        for sub in self.blobs.root.iterdir():
            if len(sub.name) != 2 or not sub.is_dir():
                continue
            for path in sub.iterdir():
                if path.name in referenced or path.name.startswith("."):
                    continue
                try:
                    st = path.stat()
                except FileNotFoundError:
                    continue
                if now - st.st_mtime < COLLECT_GRACE_S:
                    continue
                path.unlink(missing_ok=True)
                removed += 1
                freed += st.st_size
        self.stats["blobs_collected"] += removed
        self.stats["bytes_collected"] += freed
        return {"removed": removed, "bytes": freed}
