"""Write a file so that no reader ever sees half of it: a temporary file beside it, then a rename.

Every writer of a finished file in hunchwise (index manifest, model, report, plots, state
markers) goes through here, so the temporary name, the fsync and the clean-up on failure are
decided once.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path


def temporary_sibling(path: Path) -> Path:
    """A hidden, unique name in the same folder (same filesystem, so the rename is atomic)."""
    return path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.tmp")


@contextmanager
def replacing(path: str | Path, *, fsync: bool = True) -> Iterator[Path]:
    """Yield a temporary path to write; on success it replaces `path`, on error it is removed.

    >>> with replacing(target) as tmp:
    ...     fig.savefig(tmp)
    """
    target = Path(path)
    if target.is_dir():
        raise IsADirectoryError(f"{target} is a folder; give a file name to write to")
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = temporary_sibling(target)
    try:
        yield tmp
        if fsync:
            fd = os.open(tmp, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        os.replace(tmp, target)
    finally:
        tmp.unlink(missing_ok=True)


def write_bytes(path: str | Path, data: bytes, *, fsync: bool = True) -> None:
    """Write `data` to `path` atomically."""
    with replacing(path, fsync=fsync) as tmp:
        tmp.write_bytes(data)


def write_text(path: str | Path, text: str, *, fsync: bool = True) -> None:
    """Write UTF-8 `text` to `path` atomically."""
    write_bytes(path, text.encode("utf-8"), fsync=fsync)
