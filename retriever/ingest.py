"""Read, validate, store and count a corpus in one pass, in worker processes for big corpora.

The parent process only reads raw lines and merges results; parsing, validation, encoding
the article store and counting terms all happen in the workers, so on two cores the parent
is never the bottleneck. The parent keeps only what in-link counting and the key columns
need (ids, titles, aliases, links, popularity), never the article texts.
"""

from __future__ import annotations

import contextlib
import itertools
from collections import deque
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

import numpy as np

from .analyzer import Analyzer
from .corpus import Article, CorpusError, RawItem, ReadReport
from .counting import (
    CHUNK,
    Csr,
    TermCounter,
    count_texts,
    new_terms,
    no_gc,
    run_chunks,
    worker_state,
)
from .errors import RECORDS, position
from .rawitems import count_items as count_items  # re-exported: tests import them here
from .rawitems import item_offsets as item_offsets
from .rawitems import raw_items, window_items
from .recordjson import parse_item
from .scoring import concat_ranges
from .store import record_line

# One raw item: (line number, JSONL bytes | parsed record | Article | ("error", reason, field)).
# (line, position in the chunk, id, title, aliases, links, popularity)
Meta = tuple[int, int, str, str, tuple[str, ...], tuple[str, ...], float | None]


@dataclass
class Keys:
    """Per-article fields the parent keeps, in row order."""

    ids: list[str] = field(default_factory=list)
    titles: list[str] = field(default_factory=list)
    aliases: list[tuple[str, ...]] = field(default_factory=list)
    links: list[tuple[str, ...]] = field(default_factory=list)
    popularity: list[float] = field(default_factory=list)
    lines: list[int] = field(default_factory=list)  # where each came from in its file

    def __len__(self) -> int:
        return len(self.ids)

    def append(self, meta: Meta) -> None:
        """Add one article's keys."""
        self.extend([meta])

    def extend(self, metas: list[Meta]) -> None:
        """Add several articles' keys, in row order (one list operation per field)."""
        if not metas:
            return
        lines, _, ids, titles, aliases, links, pops = zip(*metas, strict=True)
        self.lines.extend(lines)
        self.ids.extend(ids)
        self.titles.extend(titles)
        self.aliases.extend(aliases)
        self.links.extend(links)
        self.popularity.extend([np.nan if p is None else p for p in pops])

    @classmethod
    def of(cls, articles: Iterable[Article]) -> Keys:
        """Keys of already-validated articles."""
        keys = cls()
        for a in articles:
            keys.append((0, 0, a.id, a.title, a.aliases, a.links, a.popularity))
        return keys


@dataclass
class ChunkOut:
    """What a worker returns for one chunk of raw items."""

    pid: int
    fresh: list[str]
    metas: list[Meta]  # good articles, in line order
    metadata: list[dict[str, Any]]  # their metadata, in the same order
    errors: list[tuple[int, str, str]]  # (line, reason, field) of bad items
    encoded: dict[int, bytes]  # store lines of good items that were not raw JSONL lines
    body: Csr
    title: Csr


def ingest_chunk(task: tuple[str, list[RawItem]]) -> ChunkOut:
    """Parse, validate, encode and count one chunk (runs in a worker)."""
    file, items = task
    analyzer, table = worker_state()
    metas: list[Meta] = []
    metadata: list[dict[str, Any]] = []
    errors: list[tuple[int, str, str]] = []
    encoded: dict[int, bytes] = {}
    bodies: list[str] = []
    titles: list[str] = []
    with no_gc():
        for pos, (line, raw) in enumerate(items):
            try:
                art = parse_item(raw, file, line)
            except CorpusError as exc:
                errors.append((line, exc.reason, exc.field))
                continue
            metas.append((line, pos, art.id, art.title, art.aliases, art.links, art.popularity))
            metadata.append(art.metadata)
            if not isinstance(raw, bytes):  # raw JSONL lines are stored as they are, by the parent
                encoded[pos] = record_line(art)
            bodies.append(art.text)
            titles.append(art.title)
    body = count_texts(analyzer, table, bodies)
    title = count_texts(analyzer, table, titles)
    pid, fresh = new_terms()
    return ChunkOut(pid, fresh, metas, metadata, errors, encoded, body, title)


def _tasks(
    file: str, items: Iterable[RawItem], bar: Any, sent: deque[list[RawItem]]
) -> Iterator[tuple[str, list[RawItem]]]:
    """Chunks of raw items; each is also remembered in `sent` until its result is merged."""
    chunk: list[RawItem] = []
    for item in items:
        chunk.append(item)
        if len(chunk) >= CHUNK:
            bar.update(len(chunk))
            sent.append(chunk)
            yield file, chunk
            chunk = []
    if chunk:
        bar.update(len(chunk))
        sent.append(chunk)
        yield file, chunk


def _keep_rows(csr: Csr, keep: np.ndarray) -> Csr:
    indptr, cols, counts = csr
    lens = np.diff(indptr)[keep]
    starts = indptr[:-1][keep]
    idx = concat_ranges(starts, lens)
    out_ptr = np.zeros(lens.size + 1, dtype=np.int64)
    np.cumsum(lens, out=out_ptr[1:])
    return out_ptr, cols[idx], counts[idx]


class Ingest:
    """Running state of one ingest: seen names, keys, store file, counts and problems."""

    def __init__(self, file: str, store_fh: IO[bytes], skip_bad: bool, report: ReadReport):
        self.file, self.store_fh, self.skip_bad, self.report = file, store_fh, skip_bad, report
        self.keys = Keys()
        # Every kept article's metadata, in row order: the metadata columns are written from
        # it, so the parent never parses the stored articles again.
        self.metadata: list[dict[str, Any]] = []
        self.counter = TermCounter()
        self.offsets: list[np.ndarray] = [np.zeros(1, dtype=np.int64)]
        self._end = 0
        self._seen_ids: dict[str, int] = {}
        self._seen_titles: dict[str, int] = {}

    def _duplicate(self, meta: Meta) -> CorpusError | None:
        line, doc_id, title = meta[0], meta[2], meta[3]
        if doc_id in self._seen_ids:
            first = self._seen_ids[doc_id]
            msg = f"duplicate id {doc_id!r} (first seen on {position(self.file, first)})"
            return CorpusError(msg, file=self.file, line=line, field="id")
        if title in self._seen_titles:
            first = self._seen_titles[title]
            msg = f"duplicate title {title!r} (first seen on {position(self.file, first)})"
            return CorpusError(msg, file=self.file, line=line, field="title")
        self._seen_ids[doc_id] = line
        self._seen_titles[title] = line
        return None

    def _all_new(self, metas: list[Meta]) -> bool:
        """Record the names of a chunk none of whose ids and titles was seen (the usual case,
        checked with set operations); False, recording nothing, when one might repeat."""
        ids = [m[2] for m in metas]
        titles = [m[3] for m in metas]
        if (
            len(set(ids)) != len(ids)
            or len(set(titles)) != len(titles)
            or not self._seen_ids.keys().isdisjoint(ids)
            or not self._seen_titles.keys().isdisjoint(titles)
        ):
            return False
        lines = [m[0] for m in metas]
        self._seen_ids.update(zip(ids, lines, strict=True))
        self._seen_titles.update(zip(titles, lines, strict=True))
        return True

    def add(self, out: ChunkOut, items: list[RawItem]) -> None:
        """Merge one chunk (`items` are its raw items), or raise its first problem when bad
        lines are not skipped."""
        problems = [
            (line, CorpusError(reason, file=self.file, line=line, field=fld))
            for line, reason, fld in out.errors
        ]
        keep = np.ones(len(out.metas), dtype=bool)
        if not self._all_new(out.metas):
            for i, meta in enumerate(out.metas):
                dup = self._duplicate(meta)
                if dup is not None:
                    keep[i] = False
                    problems.append((meta[0], dup))
        problems.sort(key=lambda p: p[0])
        if problems and not self.skip_bad:
            raise problems[0][1]
        for _, exc in problems:
            self.report.note(exc)
        body, title = out.body, out.title
        metas, metadata = out.metas, out.metadata
        if not keep.all():
            body, title = _keep_rows(body, keep), _keep_rows(title, keep)
            kept = np.flatnonzero(keep).tolist()
            metas, metadata = [metas[i] for i in kept], [metadata[i] for i in kept]
        self.keys.extend(metas)
        self.metadata.extend(metadata)
        lines = [out.encoded.get(meta[1]) or items[meta[1]][1] for meta in metas]
        # Raw lines are stored as they are; only a file's last line may lack its newline.
        lines = [line if line.endswith(b"\n") else line + b"\n" for line in lines]
        self.report.articles += len(lines)
        self.store_fh.write(b"".join(lines))
        lens = np.fromiter(map(len, lines), np.int64, len(lines))
        self.offsets.append(self._end + np.cumsum(lens))
        self._end += int(lens.sum())
        self.counter.add_parts(out.pid, out.fresh, {"body": body, "title": title})

    def store_offsets(self) -> np.ndarray:
        """Byte offsets of every stored line, plus the end."""
        return np.concatenate(self.offsets)


def ingest(
    source: str | Path | Iterable[Mapping[str, Any] | Article],
    analyzer: Analyzer,
    store_fh: IO[bytes],
    *,
    workers: int,
    skip_bad: bool,
    report: ReadReport,
    bar: Any,
    items: tuple[int, int] | None = None,
    window: tuple[int, int, int] | None = None,
) -> Ingest:
    """Read, validate, store (into `store_fh`) and count every article of `source`.

    `items`: only the raw items (lines or rows, bad ones included, blank lines not) from
    position start to stop, counted from 0: one shard of a corpus. `window`: where those
    items sit in an uncompressed JSON-lines file (see `item_offsets`), so only that part of
    the file is read.
    """
    file = str(source) if isinstance(source, str | Path) else RECORDS
    state = Ingest(file, store_fh, skip_bad, report)
    sent: deque[list[RawItem]] = deque()
    # closing: a shard stops reading before the end, and the file must not wait for the
    # garbage collector to be closed.
    opened = window_items(Path(str(source)), window) if window else raw_items(source)
    with contextlib.closing(opened) as all_items:
        raw: Iterator[RawItem] = all_items
        if items is not None:
            skip = 0 if window else items[0]
            raw = itertools.islice(all_items, skip, skip + items[1] - items[0])
        tasks = _tasks(file, raw, bar, sent)
        for out in run_chunks(ingest_chunk, tasks, analyzer, workers):
            state.add(out, sent.popleft())
    return state
