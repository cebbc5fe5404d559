"""A corpus's raw items, before any parsing: lines of a JSON-lines file (all of it, or one
byte window of it), rows of other formats, and where each item sits in the file.

The ingest's workers parse and validate these items (retriever/ingest.py); here they are
only read, counted and located, so that a sharded build can hand each shard its part.
"""

from __future__ import annotations

import gzip
from collections.abc import Generator, Iterable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from .corpus import Article, CorpusError, RawItem, detect_format, iter_raw
from .errors import JSON_ARRAY


def count_items(source: str | Path) -> int:
    """Raw items (lines or rows, blank lines not counted) of a corpus file."""
    return sum(1 for _ in raw_items(source))


def item_offsets(source: str | Path) -> tuple[np.ndarray, np.ndarray] | None:
    """Byte offset and line number of every raw item of an uncompressed JSON-lines file,
    each with one more entry for the end; None for other formats (and for a file holding
    one JSON array), whose shards are read by skipping items from the start."""
    path = Path(source)
    if path.suffix.lower() == ".gz" or detect_format(path) != "jsonl":
        return None
    offsets: list[int] = []
    lines: list[int] = []
    pos, n = 0, 0
    with open(path, "rb") as fh:
        for n, raw in enumerate(fh, 1):
            if raw.strip():
                if not offsets and raw.lstrip().startswith(b"["):
                    return None
                offsets.append(pos)
                lines.append(n)
            pos += len(raw)
    offsets.append(pos)
    lines.append(n + 1)
    return np.asarray(offsets, dtype=np.int64), np.asarray(lines, dtype=np.int64)


def window_items(path: Path, window: tuple[int, int, int]) -> Generator[RawItem, None, None]:
    """The raw items of bytes window[0]..window[1] of a JSON-lines file whose first line
    there is line window[2] (as `raw_items` gives them)."""
    start, stop, first_line = window
    with open(path, "rb") as fh:
        fh.seek(start)
        pos = start
        for n, raw in enumerate(fh, first_line):
            if pos >= stop:
                return
            pos += len(raw)
            if raw.strip():
                yield n, raw


def raw_items(
    source: str | Path | Iterable[Mapping[str, Any] | Article],
) -> Generator[RawItem, None, None]:
    """(line number, raw item) of every item of a corpus file or of records: a JSON-lines
    file's lines as bytes (parsed in the workers), other formats' parsed records, and a
    problem the reader finds as ("error", reason, field)."""
    if not isinstance(source, str | Path):
        yield from enumerate(source, 1)
        return
    path = Path(source)
    if path.exists() and detect_format(path) == "jsonl":
        opener = gzip.open if path.suffix.lower() == ".gz" else open
        with opener(path, "rb") as fh:
            first = True
            for n, raw in enumerate(fh, 1):
                if not raw.strip():
                    continue
                if first and raw.lstrip().startswith(b"["):  # as corpus.iter_raw says it
                    yield n, ("error", JSON_ARRAY, "")
                    return
                first = False
                yield n, raw
        return
    for n, rec in iter_raw(path):
        yield n, ("error", rec.reason, rec.field) if isinstance(rec, CorpusError) else rec
