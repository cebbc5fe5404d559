"""The served log: one JSON line per ranked clue (rotated by size) and per label (kept).

Several threads and several worker processes append to the same files. Each append takes an
exclusive fcntl.flock on a lock file beside the log, checks whether another process rotated
the file (inode changed) and reopens it, rotates served lines when the batch would push the
file past the size limit, and writes all its lines with one os.write on an O_APPEND
descriptor. Feedback goes to its own file, which rotation never touches: labels are what
users paid for. File names and record shapes come from `reranker.servedrecords`.

Durability: a batch is all or nothing. If a write fails part-way (disk full, file made
read-only), the file is cut back to where the batch began, so no torn line stays behind,
and the error is raised for the caller to count; the service keeps ranking. An unfinished
last line left by a crash is cut off before the next append, so it never ends up in the
middle of a file. With `fsync=True` every append is flushed to the disk before it returns.

Descriptors: one this object no longer owns is never closed or written to. A file that
cannot be reopened leaves no descriptor number behind (that number may be another
connection's socket by the next append), and a lock file made again (the folder was
removed and recreated) is the one locked from then on, so all processes lock the same file.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import logging
import math
import numbers
import os
import threading
from collections.abc import Iterable, Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import orjson

from reranker.servedrecords import FEEDBACK, SERVED, log_files, rotated_name

LOCK = ".served.lock"
_log = logging.getLogger("hunchwise.service")


def utc_now() -> str:
    """Current time as ISO-8601 UTC with milliseconds, e.g. 2030-01-02T03:04:05.678Z."""
    return datetime.now(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _finite(value: Any) -> bool:
    """False when a NaN or an infinity is anywhere in a JSON-like value (no recursion)."""
    # Exact types first: a served record is plain dicts, lists, str, float, int and None, and
    # isinstance against the Mapping ABC costs several times a type comparison. This walk
    # runs for every record holding a null (a decision without an answer has one).
    stack = [value]
    while stack:
        item = stack.pop()
        kind = type(item)
        if kind is float:
            if item - item != 0.0:  # inf - inf and nan - nan are nan
                return False
        elif kind is dict:
            stack.extend(item.values())
        elif kind is list or kind is tuple:
            stack.extend(item)
        elif kind is str or kind is int or item is None or kind is bool:
            continue
        elif isinstance(item, numbers.Real):  # numpy's float32 is not a float subclass
            if not math.isfinite(item):
                return False
        elif isinstance(item, Mapping):
            stack.extend(item.values())
        elif isinstance(item, list | tuple):
            stack.extend(item)
    return True


def encode_line(record: Mapping[str, Any]) -> bytes:
    """One JSON line (UTF-8), NaN and infinities refused (ValueError).

    orjson first: the standard encoder spent about 0.3 ms on a served line's hundred-odd
    floats, a large share of a rank request. orjson writes a non-finite number as null, so
    only a line that holds a null is walked to tell the two apart. A string orjson refuses
    (a lone surrogate) falls back to the standard encoder's ASCII escapes, so any clue encodes.
    """
    try:
        line = orjson.dumps(record, option=orjson.OPT_APPEND_NEWLINE | orjson.OPT_SERIALIZE_NUMPY)
    except TypeError:
        text = json.dumps(record, ensure_ascii=True, allow_nan=False, separators=(",", ":"))
        return text.encode("ascii") + b"\n"
    if b"null" in line and not _finite(record):
        raise ValueError("Out of range float values are not JSON compliant (NaN or infinity)")
    return line


def encode_lines(records: Iterable[Mapping[str, Any]]) -> bytes:
    """JSON lines, one per record (see `encode_line`)."""
    return b"".join(encode_line(r) for r in records)


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
            # Read access too: the tail is checked before appending (see ServedLog._repair_tail).
            fd = os.open(self.path, os.O_RDWR | os.O_APPEND | os.O_CREAT, 0o644)
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
        self.repaired_bytes = 0  # unfinished tails cut off before appending (see _repair_tail)
        self._served = _AppendFile(self.path)
        self._feedback = _AppendFile(self.folder / FEEDBACK)

    def _rotate(self) -> None:
        for n in range(self.backups - 1, 0, -1):
            src = self.folder / rotated_name(n)
            if src.exists():
                os.replace(src, self.folder / rotated_name(n + 1))
        os.replace(self.path, self.folder / rotated_name(1))
        self._served.drop()

    def _lock(self) -> int:
        """Take the cross-process lock; the lock file at its path, reopened if it was replaced.

        Processes exclude each other only if they lock the same file. If the folder was
        removed and made again, a descriptor opened before locks the old, deleted file while
        a process started after locks the new one; so after locking, check that the path
        still names the locked file, and if not, lock the file it names now.
        """
        while True:
            if self._lock_fd < 0:
                self._lock_fd = os.open(self.folder / LOCK, os.O_RDWR | os.O_CREAT, 0o644)
            fcntl.flock(self._lock_fd, fcntl.LOCK_EX)
            try:
                same = os.stat(self.folder / LOCK).st_ino == os.fstat(self._lock_fd).st_ino
            except FileNotFoundError:
                same = False
            if same:
                return self._lock_fd
            try:
                # Open the new lock file first: on error the old one, still ours, stays.
                fd = os.open(self.folder / LOCK, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError:
                fcntl.flock(self._lock_fd, fcntl.LOCK_UN)
                raise
            old, self._lock_fd = self._lock_fd, fd
            os.close(old)  # closing also releases the lock on the stale file

    def _repair_tail(self, target: _AppendFile, fd: int, size: int) -> int:
        """Cut an unfinished last line (a crash mid-write) off before appending; new size.

        Appending after such a fragment would glue the next line to it: a broken line in
        the middle of the file, which the reader refuses. Cut back to the last newline.
        """
        if size == 0 or os.pread(fd, 1, size - 1) == b"\n":
            return size
        end = size
        while end > 0:
            start = max(0, end - 65536)
            chunk = os.pread(fd, end - start, start)
            cut = chunk.rfind(b"\n")
            if cut >= 0:
                end = start + cut + 1
                break
            end = start
        os.ftruncate(fd, end)
        self.repaired_bytes += size - end
        _log.warning("%s: cut an unfinished last line (%d bytes)", target.path, size - end)
        return end

    def _write(self, target: _AppendFile, data: bytes, *, rotate: bool) -> None:
        with self._thread_lock:
            lock_fd = self._lock()
            try:
                fd = target.current()
                size = self._repair_tail(target, fd, os.fstat(fd).st_size)
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
                    # If even that fails, the next append cuts the unfinished line off.
                    with contextlib.suppress(OSError):
                        os.ftruncate(fd, size)
                    raise
            finally:
                fcntl.flock(lock_fd, fcntl.LOCK_UN)

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
