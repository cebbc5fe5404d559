"""Pass 1 of a sharded build: count contiguous ranges of the corpus, one per shard, and reduce
the counts to the corpus's statistics, names and links (retriever/shards.py runs it).

With a Ray cluster the ranges are a Ray Data dataset (one row per range: its items and its
byte window) whose batches `CountRanges` workers count (`Runner.map_batches`); the driver
reduces what comes back. Without one, `count_shard` runs over the ranges in this process.
"""

from __future__ import annotations

import itertools
import os
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .analyzer import Analyzer, AnalyzerConfig
from .cluster import Runner
from .corpus import CorpusError, ReadReport
from .counting import no_gc
from .errors import position
from .folderwriter import KnownLinks
from .ingest import Keys, ingest
from .links import NameResolver, count_inlinks
from .postings import CorpusStats, FieldStats, sorted_terms


@dataclass
class ShardCounts:
    """What pass 1 learns about one shard (its items start..stop of the corpus)."""

    start: int
    stop: int
    terms: list[str]  # the shard's terms, in the order it met them
    body_df: np.ndarray  # articles holding each of `terms`, per field (int64)
    title_df: np.ndarray
    body_len: int  # tokens of the field over the shard
    title_len: int
    keys: Keys
    skipped: int
    problems: list[str]


def _windows(
    offsets: tuple[np.ndarray, np.ndarray] | None, spans: Sequence[tuple[int, int]]
) -> list[tuple[int, int, int] | None]:
    """Each span's (first byte, end byte, first line) in the file, split up front so each
    task reads only its own part; None each where the format has no byte offsets."""
    if offsets is None:
        return [None] * len(spans)
    at, lines = offsets
    return [(int(at[a]), int(at[b]), int(lines[a])) for a, b in spans]


class _NoBar:
    def update(self, n: int) -> None:
        """Progress is not shown inside tasks."""


def split_items(n_items: int, n_shards: int) -> list[tuple[int, int]]:
    """`n_shards` contiguous (start, stop) ranges of `n_items` items (sizes differ by 1 at
    most; empty ones are left out)."""
    if n_shards < 1:
        raise ValueError(f"the number of shards must be at least 1, got {n_shards}")
    cuts = [n_items * i // n_shards for i in range(n_shards + 1)]
    return [(a, b) for a, b in itertools.pairwise(cuts) if b > a]


def count_shard(
    corpus: str,
    span: tuple[int, int],
    analyzer: dict[str, Any],
    skip_bad: bool,
    window: tuple[int, int, int] | None = None,
) -> ShardCounts:
    """Pass 1 on items span[0]..span[1] of `corpus`: term statistics and name keys.
    `window`: where those items sit in the file (`spans_windows`), so only they are read."""
    an = Analyzer(AnalyzerConfig.from_dict(analyzer))
    report = ReadReport()
    with no_gc(), open(os.devnull, "wb") as sink:
        state = ingest(
            corpus,
            an,
            sink,
            workers=1,
            skip_bad=skip_bad,
            report=report,
            bar=_NoBar(),
            items=span,
            window=window,
        )
    n_terms = len(state.counter.terms)
    found = {}
    for name in ("body", "title"):
        m = state.counter.matrix(name)
        # Each (article, term) pair is stored once, so a column's entries are its articles.
        found[name] = (
            np.bincount(m.indices, minlength=n_terms).astype(np.int64),
            int(m.data.sum(dtype=np.int64)),
        )
    return ShardCounts(
        span[0],
        span[1],
        list(state.counter.terms),
        found["body"][0],
        found["title"][0],
        found["body"][1],
        found["title"][1],
        state.keys,
        report.skipped,
        report.problems,
    )


class CountRanges:
    """A Ray Data worker: counts each range of a batch (`start`, `stop`, and its byte window
    `first_byte`, `end_byte`, `first_line`, all -1 where the format has none)."""

    def __init__(self, corpus: str, analyzer: dict[str, Any], skip_bad: bool) -> None:
        self.corpus, self.analyzer, self.skip_bad = corpus, analyzer, skip_bad

    def __call__(self, batch: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        counts = np.empty(len(batch["seq"]), dtype=object)
        for i, (a, b, first, end, line) in enumerate(
            zip(
                batch["start"].tolist(),
                batch["stop"].tolist(),
                batch["first_byte"].tolist(),
                batch["end_byte"].tolist(),
                batch["first_line"].tolist(),
                strict=True,
            )
        ):
            window = None if first < 0 else (first, end, line)
            counts[i] = count_shard(self.corpus, (a, b), self.analyzer, self.skip_bad, window)
        return {"seq": batch["seq"], "counts": counts}


def count_ranges(
    runner: Runner,
    corpus: str,
    spans: Sequence[tuple[int, int]],
    windows: Sequence[tuple[int, int, int] | None],
    analyzer: dict[str, Any],
    skip_bad: bool,
) -> tuple[list[ShardCounts], dict[str, Any]]:
    """Every span's counts, in order, and how they were counted (for the build's record): as
    a Ray Data job when `runner` has a cluster (one range per batch, so the ranges are counted
    side by side; the record lists the job's operators from the driver's dataset statistics),
    else one after the other here."""
    if runner.ray is None:
        calls = [
            (corpus, tuple(s), analyzer, skip_bad, w) for s, w in zip(spans, windows, strict=True)
        ]
        return list(runner.map(count_shard, calls)), {"engine": "in-process"}
    flat = [w if w is not None else (-1, -1, -1) for w in windows]
    columns = {
        "seq": np.arange(len(spans), dtype=np.int64),
        "start": np.asarray([s[0] for s in spans], dtype=np.int64),
        "stop": np.asarray([s[1] for s in spans], dtype=np.int64),
        "first_byte": np.asarray([w[0] for w in flat], dtype=np.int64),
        "end_byte": np.asarray([w[1] for w in flat], dtype=np.int64),
        "first_line": np.asarray([w[2] for w in flat], dtype=np.int64),
    }
    out = runner.map_batches(columns, CountRanges, (corpus, analyzer, skip_bad), 1)
    stats = runner.data_runs[-1] if runner.data_runs else ""
    operators = [line for line in stats.splitlines() if line.startswith("Operator ")]
    return list(out["counts"]), {"engine": "ray data", "operators": operators}


def reduce_stats(parts: Sequence[ShardCounts]) -> CorpusStats:
    """The corpus's vocabulary, document frequencies and lengths from every shard's counts."""
    used: set[str] = set()
    for p in parts:
        used.update(t for t, b, h in zip(p.terms, p.body_df, p.title_df, strict=True) if b or h)
    terms = sorted_terms(used)
    where = {t: i for i, t in enumerate(terms)}
    body_df = np.zeros(len(terms), dtype=np.int64)
    title_df = np.zeros(len(terms), dtype=np.int64)
    for p in parts:
        ids = np.asarray([where.get(t, -1) for t in p.terms], dtype=np.int64)
        keep = ids >= 0
        np.add.at(body_df, ids[keep], p.body_df[keep])
        np.add.at(title_df, ids[keep], p.title_df[keep])
    n = sum(len(p.keys) for p in parts)
    return CorpusStats(
        terms,
        FieldStats(body_df, n, sum(p.body_len for p in parts)),
        FieldStats(title_df, n, sum(p.title_len for p in parts)),
    )


def join_keys(corpus: str, parts: Sequence[ShardCounts]) -> Keys:
    """Every shard's keys in row order; an id or title met in two shards is refused, as a
    single build refuses it (a sharded build cannot skip it: the rows are already counted)."""
    keys = Keys()
    seen: dict[str, dict[str, int]] = {"id": {}, "title": {}}
    for p in parts:
        k = p.keys
        for i, line in enumerate(k.lines):
            for fld, value in (("id", k.ids[i]), ("title", k.titles[i])):
                first = seen[fld].setdefault(value, line)
                if first != line:
                    raise CorpusError(
                        f"duplicate {fld} {value!r} (first seen on {position(corpus, first)})",
                        file=corpus,
                        line=line,
                        field=fld,
                    )
            keys.append((line, 0, k.ids[i], k.titles[i], k.aliases[i], k.links[i], k.popularity[i]))
    return keys


def resolve_links(keys: Keys, parts: Sequence[ShardCounts]) -> list[KnownLinks]:
    """In-links over the whole corpus (links joined to every shard's names), split by shard."""
    resolver = NameResolver(keys.ids, keys.titles, keys.aliases)
    inlinks, missing = count_inlinks(resolver, keys.links, len(keys))
    out, first = [], 0
    for p in parts:
        last = first + len(p.keys)
        unresolved = [(keys.ids[row], name) for row, name in missing if first <= row < last]
        out.append(KnownLinks(inlinks[first:last], unresolved, len(resolver.ambiguous_aliases)))
        first = last
    return out
