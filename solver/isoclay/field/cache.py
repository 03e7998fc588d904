"""Content-addressed, size-bounded cache of fitted fields, so a second edit of one object skips the fit.

Entries are checkpoint files named by a 64-hex key (hash of the mesh and the fit settings);
keys are checked so no caller can slip a path in. Least recently used entries are evicted once
the total size passes the bound; a hit refreshes the entry's time. Writes are atomic (temporary
file, fsync, rename), so a crash leaves either the whole entry or none.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

from ..errors import InvalidInput

_HEX = set("0123456789abcdef")
SUFFIX = ".pt"


def check_key(key) -> str:
    """The key itself if it is 64 lowercase hex characters, else InvalidInput."""
    if not isinstance(key, str) or len(key) != 64 or not set(key) <= _HEX:
        raise InvalidInput(f"field cache key {str(key)[:70]!r} is not 64 hex characters: pass a content hash")
    return key


class FieldCache:
    """Fitted fields under ``root`` keyed by content hash; at most ``max_bytes`` on disk."""

    def __init__(self, root, max_bytes: int = 2 << 30):
        if max_bytes <= 0:
            raise InvalidInput(f"field cache size must be positive, got {max_bytes}")
        self.root = Path(root)
        self.root.mkdir(parents=True, exist_ok=True, mode=0o700)
        self.max_bytes = int(max_bytes)

    def path(self, key: str) -> Path:
        return self.root / (check_key(key) + SUFFIX)

    def __contains__(self, key: str) -> bool:
        return self.path(key).is_file()

    def get(self, key: str):
        """(field, extra) for a cached key, or None; a hit marks the entry as recently used."""
        path = self.path(key)
        if not path.is_file():
            return None
        from .checkpoint import load_field

        try:
            loaded = load_field(path)
        except Exception:  # a damaged entry is a miss, never a crash; drop it so it is refitted
            path.unlink(missing_ok=True)
            return None
        now = time.time()
        os.utime(path, (now, now))
        return loaded

    def put(self, key: str, field, extra: dict | None = None) -> Path:
        """Store a field under ``key`` (atomic), then evict least recently used entries past the bound."""
        from .checkpoint import save_field

        target = self.path(key)
        tmp = self.root / f".tmp-{os.getpid()}-{os.urandom(6).hex()}{SUFFIX}"
        save_field(tmp, field, dict(extra or {}, cache_key=key))
        self.adopt(key, tmp)
        return target

    def adopt(self, key: str, checkpoint_path) -> Path:
        """Move an already written checkpoint file into the cache under ``key`` (the file is consumed)."""
        target = self.path(key)
        with open(checkpoint_path, "rb") as handle:
            os.fsync(handle.fileno())
        os.replace(checkpoint_path, target)
        if os.name != "nt":  # make the rename durable (no directory handles on Windows)
            fd = os.open(self.root, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        self.evict(keep=key)
        return target

    def entries(self) -> list[tuple[str, int, float]]:
        """(key, bytes, last use) of every entry, least recently used first."""
        out = []
        for p in self.root.glob("*" + SUFFIX):
            if p.name.startswith(".tmp-"):
                continue
            try:
                st = p.stat()
            except FileNotFoundError:
                continue
            out.append((p.name[: -len(SUFFIX)], st.st_size, st.st_mtime))
        return sorted(out, key=lambda e: e[2])

    def size(self) -> int:
        return sum(e[1] for e in self.entries())

    def evict(self, keep: str | None = None) -> list[str]:
        """Drop least recently used entries until the total fits ``max_bytes``; returns evicted keys."""
        entries = self.entries()
        total = sum(e[1] for e in entries)
        evicted = []
        for key, size, _ in entries:
            if total <= self.max_bytes:
                break
            if key == keep:
                continue
            (self.root / (key + SUFFIX)).unlink(missing_ok=True)
            total -= size
            evicted.append(key)
        return evicted
