"""Content-addressed blob files: named by the SHA-256 of their bytes, written so a crash never leaves a torn one.

Each write goes to a temporary file in the target directory, is fsynced, renamed into place and
the directory fsynced (a rename is durable only after both; see FACTS.md). Reads verify the hash.
Also the mesh blob format: a small msgpack header plus raw little-endian arrays.
"""

from __future__ import annotations

import hashlib
import os
import struct
from pathlib import Path

import msgpack
import numpy as np

from ..errors import InvalidInput, SolverFailure

MESH_MAGIC = b"ICMESH1\0"
#: Blobs of named arrays (e.g. the handle points of a deform request).
ARRAYS_MAGIC = b"ICARRS1\0"
_HEX = set("0123456789abcdef")


def check_hash(digest: str) -> str:
    """Refuse anything but 64 lowercase hex characters (clients never send paths)."""
    if not isinstance(digest, str) or len(digest) != 64 or not set(digest) <= _HEX:
        raise InvalidInput(f"blob key {str(digest)[:70]!r} is not 64 hex characters: send a content hash, not a path")
    return digest


def fsync_dir(path: Path) -> None:
    """Make a rename in ``path`` durable (POSIX; Windows has no directory handles for this)."""
    if os.name == "nt":
        return
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class BlobStore:
    """Blobs under ``root/ab/abcdef...``; immutable once written, so concurrent readers are safe."""

    def __init__(self, root):
        self.root = Path(root)
        self.root.mkdir(parents=True, exist_ok=True, mode=0o700)

    def path(self, digest: str) -> Path:
        check_hash(digest)
        return self.root / digest[:2] / digest

    def has(self, digest: str) -> bool:
        return self.path(digest).is_file()

    def put_bytes(self, chunks) -> str:
        """Store bytes (one buffer or a list of buffers) durably; returns their SHA-256."""
        if isinstance(chunks, (bytes, bytearray, memoryview)):
            chunks = [chunks]
        h = hashlib.sha256()
        for c in chunks:
            h.update(c)
        digest = h.hexdigest()
        target = self.path(digest)
        if target.is_file():
            return digest
        target.parent.mkdir(exist_ok=True, mode=0o700)
        tmp = target.parent / f".tmp-{os.getpid()}-{os.urandom(6).hex()}"
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        try:
            for c in chunks:
                view = memoryview(c).cast("B")
                while view.nbytes:
                    view = view[os.write(fd, view):]
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, target)
        fsync_dir(target.parent)
        return digest

    def put_file(self, source) -> str:
        """Move a finished file (e.g. a checkpoint) into the store under its hash; the source is consumed."""
        source = Path(source)
        h = hashlib.sha256()
        with open(source, "rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                h.update(block)
            os.fsync(handle.fileno())
        digest = h.hexdigest()
        target = self.path(digest)
        if target.is_file():
            source.unlink()
            return digest
        target.parent.mkdir(exist_ok=True, mode=0o700)
        os.replace(source, target)
        fsync_dir(target.parent)
        return digest

    def read(self, digest: str, verify: bool = True) -> bytes:
        """The blob's bytes; raises SolverFailure if it is missing or does not match its hash."""
        path = self.path(digest)
        try:
            data = path.read_bytes()
        except OSError:
            raise SolverFailure(f"history blob {digest[:12]} is missing: the solver's data directory was altered") from None
        if verify and hashlib.sha256(data).hexdigest() != digest:
            raise SolverFailure(f"history blob {digest[:12]} is corrupt (hash mismatch): restore the data directory")
        return data

    def verify(self, digest: str) -> bool:
        try:
            self.read(digest)
            return True
        except SolverFailure:
            return False

    def clean_temporaries(self) -> int:
        """Remove temporary files left by a crash mid-write; returns how many."""
        removed = 0
        for pattern in ("*/.tmp-*", "tmp/*", "tmp/.*"):
            for tmp in self.root.glob(pattern):
                if tmp.is_file():
                    tmp.unlink(missing_ok=True)
                    removed += 1
        return removed


def pack_mesh(vertices: np.ndarray, faces: np.ndarray, values: dict | None = None, extra: dict | None = None) -> list:
    """Buffers of a mesh blob: magic, header length, msgpack header, raw arrays (f8 / i8 / f4).

    extra : more named arrays stored with their own dtype (e.g. "source_face" <i4, "source_bary" <f4),
        read back by unpack_arrays; unpack_mesh ignores them
    """
    arrays = [("vertices", np.ascontiguousarray(vertices, "<f8")), ("faces", np.ascontiguousarray(faces, "<i8"))]
    for name in sorted(values or {}):
        arrays.append((f"value:{name}", np.ascontiguousarray(values[name], "<f4")))
    for name in sorted(extra or {}):
        array = np.asarray(extra[name])
        arrays.append((name, np.ascontiguousarray(array, array.dtype.newbyteorder("<"))))
    return pack_arrays(arrays, MESH_MAGIC)


def pack_arrays(arrays, magic: bytes = ARRAYS_MAGIC) -> list:
    """Buffers of an arrays blob: magic, header length, msgpack header [[name, dtype, shape], ...], raw arrays.

    arrays : sequence of (name, array) or a dict; stored little-endian, in the given order
    """
    items = list(arrays.items()) if isinstance(arrays, dict) else list(arrays)
    items = [(n, np.ascontiguousarray(a, np.asarray(a).dtype.newbyteorder("<"))) for n, a in items]
    header = msgpack.packb([[n, a.dtype.str, list(a.shape)] for n, a in items], use_bin_type=True)
    return [magic, struct.pack("<I", len(header)), header] + [memoryview(a).cast("B") if a.nbytes else b"" for _, a in items]


def unpack_arrays(data, magic: bytes = ARRAYS_MAGIC) -> dict:
    """name -> read-only array view of a blob written by pack_arrays (or pack_mesh with MESH_MAGIC)."""
    view = memoryview(data)
    if bytes(view[:8]) != magic:
        raise SolverFailure("history blob is not of the expected isoclay kind: the data directory was altered")
    (length,) = struct.unpack("<I", view[8:12])
    header = msgpack.unpackb(view[12:12 + length], raw=False)
    offset, out = 12 + length, {}
    for name, code, shape in header:
        dtype = np.dtype(code)
        count = int(np.prod(shape))
        out[name] = np.frombuffer(view, dtype, count, offset).reshape(shape)
        offset += count * dtype.itemsize
    return out


def unpack_mesh(data) -> tuple[np.ndarray, np.ndarray, dict]:
    """(vertices (n,3) f8, faces (m,3) i8, values {name: (n,) f4}) from a mesh blob (read-only views)."""
    if bytes(memoryview(data)[:8]) != MESH_MAGIC:
        raise SolverFailure("history blob is not an isoclay mesh: the data directory was altered")
    out = unpack_arrays(data, MESH_MAGIC)
    values = {k[6:]: v for k, v in out.items() if k.startswith("value:")}
    return out["vertices"], out["faces"], values
