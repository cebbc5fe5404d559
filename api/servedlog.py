"""The served log: one JSON line per ranked clue and per feedback, rotated by size.

Several threads and several worker processes append to the same file. Each append takes
an exclusive fcntl.flock on a lock file beside the log, checks whether another process
rotated the file (inode changed) and reopens it, rotates when the line would push the file
past the size limit, and writes all its lines with one os.write on an O_APPEND descriptor.
os.write leaves nothing in a user-space buffer, so a clean shutdown loses no line.
"""

from __future__ import annotations

import fcntl
import json
import os
import threading
from collections.abc import Iterable, Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

SERVED = "served.jsonl"
LOCK = ".served.lock"


def utc_now() -> str:
    """Current time as ISO-8601 UTC with milliseconds, e.g. 2030-01-02T03:04:05.678Z."""
    return datetime.now(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def encode_lines(records: Iterable[Mapping[str, Any]]) -> bytes:
    """JSON lines; ASCII-escaped so any clue (even lone surrogates) encodes, NaN refused."""
    return b"".join(
        json.dumps(r, ensure_ascii=True, allow_nan=False, separators=(",", ":")).encode("ascii")
        + b"\n"
        for r in records
    )


def rotated_name(n: int) -> str:
    """File name of the n-th rotated log (1 is the newest)."""
    return f"served.{n}.jsonl"


class ServedLog:
    """Append-only JSON-lines log in a folder, safe across threads and processes."""

    def __init__(self, folder: str | Path, *, max_bytes: int, backups: int) -> None:
        if max_bytes < 1 or backups < 1:
            raise ValueError("max_bytes and backups must be at least 1")
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self.path = self.folder / SERVED
        self.max_bytes = max_bytes
        self.backups = backups
        self._thread_lock = threading.Lock()
        self._lock_fd = os.open(self.folder / LOCK, os.O_RDWR | os.O_CREAT, 0o644)
        self._fd: int | None = None
        self._ino: int | None = None

    def _open(self) -> int:
        if self._fd is not None:
            os.close(self._fd)
        fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        self._fd, self._ino = fd, os.fstat(fd).st_ino
        return fd

    def _current(self) -> int:
        """Descriptor of the live file, reopened if another process rotated it away."""
        try:
            ino = os.stat(self.path).st_ino
        except FileNotFoundError:
            ino = None
        if self._fd is None or ino != self._ino:
            return self._open()
        return self._fd

    def _rotate(self) -> int:
        for n in range(self.backups - 1, 0, -1):
            src = self.folder / rotated_name(n)
            if src.exists():
                os.replace(src, self.folder / rotated_name(n + 1))
        os.replace(self.path, self.folder / rotated_name(1))
        return self._open()

    def append(self, records: Iterable[Mapping[str, Any]]) -> None:
        """Append records as whole lines in one write (all or nothing for a batch)."""
        data = encode_lines(records)
        if not data:
            return
        with self._thread_lock:
            fcntl.flock(self._lock_fd, fcntl.LOCK_EX)
            try:
                fd = self._current()
                size = os.fstat(fd).st_size
                if size > 0 and size + len(data) > self.max_bytes:
                    fd = self._rotate()
                view = memoryview(data)
                while view:
                    written = os.write(fd, view)
                    view = view[written:]
            finally:
                fcntl.flock(self._lock_fd, fcntl.LOCK_UN)

    def files(self) -> list[Path]:
        """Existing log files, oldest first (the order a reader should take them in)."""
        rotated = [self.folder / rotated_name(n) for n in range(self.backups, 0, -1)]
        return [p for p in [*rotated, self.path] if p.exists()]

    def close(self) -> None:
        """Flush to disk and close the descriptors."""
        with self._thread_lock:
            if self._fd is not None:
                os.fsync(self._fd)
                os.close(self._fd)
                self._fd = None
            if self._lock_fd >= 0:
                os.close(self._lock_fd)
                self._lock_fd = -1
