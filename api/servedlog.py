"""The served log: one JSON line per ranked clue (rotated by size) and per label (kept).

Several threads and several worker processes append to the same files. Each append takes an
exclusive fcntl.flock on a lock file beside the log, checks whether another process rotated
the file (inode changed) and reopens it, rotates served lines when the batch would push the
file past the size limit, and writes all its lines with one os.write on an O_APPEND
descriptor. Feedback goes to its own file, which rotation never touches: labels are what
users paid for. File names and record shapes come from `reranker.servedrecords`.

Durability: a batch is all or nothing. If a write fails part-way (disk full, file made
read-only), the file is cut back to where the batch began, so no torn line stays behind,
and the error is raised for the caller to count; the service keeps ranking. With
`fsync=True` every append is flushed to the disk before it returns.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
import threading
from collections.abc import Iterable, Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from reranker.servedrecords import FEEDBACK, SERVED, log_files, rotated_name

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


class _AppendFile:
    """One append-only file and the descriptor this process holds on it."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.fd: int | None = None
        self.ino: int | None = None

    def drop(self) -> None:
        """Close our descriptor and forget its number (it may be reused by anyone after)."""
        fd, self.fd, self.ino = self.fd, None, None
        if fd is not None:
            os.close(fd)

    def current(self) -> int:
        """Descriptor of the live file, reopened if it was rotated away or removed."""
        try:
            ino: int | None = os.stat(self.path).st_ino
        except FileNotFoundError:
            ino = None
        if self.fd is None or ino != self.ino:
            # Drop the old descriptor first: if the open below fails (folder gone, no
            # permission, out of descriptors) we keep no number we no longer own.
            self.drop()
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
            self.fd, self.ino = fd, os.fstat(fd).st_ino
        return self.fd


class ServedLog:
    """Append-only JSON-lines log in a folder, safe across threads and processes."""

    def __init__(
        self, folder: str | Path, *, max_bytes: int, backups: int, fsync: bool = False
    ) -> None:
        if max_bytes < 1 or backups < 1:
            raise ValueError("max_bytes and backups must be at least 1")
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self.path = self.folder / SERVED
        self.max_bytes = max_bytes
        self.backups = backups
        self.fsync = fsync
        self._thread_lock = threading.Lock()
        self._lock_fd = os.open(self.folder / LOCK, os.O_RDWR | os.O_CREAT, 0o644)
        self._served = _AppendFile(self.path)
        self._feedback = _AppendFile(self.folder / FEEDBACK)

    def _rotate(self) -> None:
        for n in range(self.backups - 1, 0, -1):
            src = self.folder / rotated_name(n)
            if src.exists():
                os.replace(src, self.folder / rotated_name(n + 1))
        os.replace(self.path, self.folder / rotated_name(1))
        self._served.drop()

    def _write(self, target: _AppendFile, data: bytes, *, rotate: bool) -> None:
        with self._thread_lock:
            fcntl.flock(self._lock_fd, fcntl.LOCK_EX)
            try:
                fd = target.current()
                size = os.fstat(fd).st_size
                if rotate and size > 0 and size + len(data) > self.max_bytes:
                    self._rotate()
                    fd, size = target.current(), 0
                view = memoryview(data)
                try:
                    while view:
                        written = os.write(fd, view)
                        view = view[written:]
                    if self.fsync:
                        os.fsync(fd)
                except OSError:
                    # All or nothing: cut back to where this batch began (we hold the lock,
                    # so nobody else appended meanwhile), then let the caller count it.
                    # If even that fails, the reader skips the unfinished last line, counting it.
                    with contextlib.suppress(OSError):
                        os.ftruncate(fd, size)
                    raise
            finally:
                fcntl.flock(self._lock_fd, fcntl.LOCK_UN)

    def append(self, records: Iterable[Mapping[str, Any]]) -> None:
        """Append served records as whole lines in one write (all or nothing for a batch)."""
        data = encode_lines(records)
        if data:
            self._write(self._served, data, rotate=True)

    def append_feedback(self, records: Iterable[Mapping[str, Any]]) -> None:
        """Append feedback records to the feedback file, which is never rotated."""
        data = encode_lines(records)
        if data:
            self._write(self._feedback, data, rotate=False)

    def files(self) -> list[Path]:
        """Existing log files in reading order (served oldest first, then feedback)."""
        return log_files(self.folder)

    def close(self) -> None:
        """Flush to disk and close the descriptors."""
        with self._thread_lock:
            for f in (self._served, self._feedback):
                if f.fd is not None:
                    os.fsync(f.fd)
                f.drop()
            if self._lock_fd >= 0:
                os.close(self._lock_fd)
                self._lock_fd = -1
