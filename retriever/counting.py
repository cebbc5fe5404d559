"""Count the terms of many articles into sparse matrices, in worker processes for big corpora."""

from __future__ import annotations

import contextlib
import gc
import importlib
import multiprocessing
import os
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Sequence
from typing import Any, TypeVar

import numpy as np
import scipy.sparse as sp

from .analyzer import Analyzer, AnalyzerConfig, TermTable, default_pattern

_analysis: Any
try:
    _analysis = importlib.import_module("retriever._analysis")  # built by setup.py
except ImportError:  # pragma: no cover - no C compiler at install time
    _analysis = None

CHUNK = 4_000  # articles per task: big enough to amortize pickling, small enough to stream


def cores() -> int:
    """CPU cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not on Linux
        return os.cpu_count() or 1


def default_workers(n_hint: int) -> int:
    """Worker processes worth starting for about `n_hint` articles (1 means in-process)."""
    if n_hint < 20_000:
        return 1
    return max(1, min(2, cores()))


Csr = tuple[np.ndarray, np.ndarray, np.ndarray]  # indptr, term ids (local), counts
ChunkResult = tuple[int, list[str], Csr, Csr]


def has_kernel() -> bool:
    """Whether the compiled texts-to-term-ids loop (retriever/_analysis.c) is built."""
    return _analysis is not None


def _ids_of(
    analyzer: Analyzer, table: TermTable, texts: Sequence[str], use_kernel: bool = True
) -> tuple[np.ndarray, np.ndarray]:
    """Term ids of each text (stopwords dropped), concatenated, and the count per text.

    With the default token pattern the compiled loop does the work (same ids, same order of
    new terms: tests/retriever/test_counting_kernel.py); this loop is its definition.
    """
    if use_kernel and _analysis is not None and default_pattern(analyzer):
        # A plain TermTable's new words are added by the same steps in C (its parts passed).
        parts = table.parts() if type(table) is TermTable else None
        flat_b, lens_b = _analysis.term_ids_many(
            list(texts), table, analyzer.config.casefold, analyzer.words, parts
        )
        return np.frombuffer(flat_b, dtype=np.int64), np.frombuffer(lens_b, dtype=np.int64)
    flat: list[int] = []
    lens = np.empty(len(texts), dtype=np.int64)
    for i, text in enumerate(texts):
        before = len(flat)
        flat.extend(analyzer.term_ids(text, table))
        lens[i] = len(flat) - before
    ids = np.asarray(flat, dtype=np.int64)
    if ids.size == 0:
        return ids, np.zeros(len(texts), dtype=np.int64)
    keep = ids >= 0
    # Words per text minus the stopwords among them.
    rows = np.repeat(np.arange(len(texts)), lens)
    kept_lens = np.bincount(rows[keep], minlength=len(texts))
    return ids[keep], kept_lens


@contextlib.contextmanager
def no_gc() -> Iterator[None]:
    """Pause the cyclic garbage collector: counting makes millions of short strings and no
    cycles, and the collector's passes over them cost ~20% of the time (measured)."""
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def count_texts(
    analyzer: Analyzer, table: TermTable, texts: Sequence[str], use_kernel: bool = True
) -> Csr:
    """Doc-major term counts of `texts` as CSR parts; term ids are `table`'s."""
    with no_gc():
        ids, lens = _ids_of(analyzer, table, texts, use_kernel)
    if use_kernel and _analysis is not None and hasattr(_analysis, "count_rows"):
        # The compiled count (retriever/_analysis.c); the lines below are its definition.
        indptr_b, cols_b, counts_b = _analysis.count_rows(ids, lens)
        return (
            np.frombuffer(indptr_b, dtype=np.int64),
            np.frombuffer(cols_b, dtype=np.int32),
            np.frombuffer(counts_b, dtype=np.int32),
        )
    indptr = np.zeros(len(texts) + 1, dtype=np.int64)
    if ids.size == 0:
        return indptr, np.zeros(0, np.int32), np.zeros(0, np.int32)
    rows = np.repeat(np.arange(len(texts), dtype=np.int64), lens)
    width = int(ids.max()) + 1
    keys, counts = np.unique(rows * width + ids, return_counts=True)  # sorted by (row, term)
    np.cumsum(np.bincount(keys // width, minlength=len(texts)), out=indptr[1:])
    return indptr, (keys % width).astype(np.int32), counts.astype(np.int32)


class _Worker:
    """State of one counting process: its analyzer and its own word table."""

    analyzer: Analyzer | None = None
    table: TermTable | None = None
    sent = 0


def _init_worker(config: dict[str, Any]) -> None:
    _Worker.analyzer = Analyzer(AnalyzerConfig.from_dict(config))
    _Worker.table = _Worker.analyzer.term_table()
    _Worker.sent = 0


def worker_state() -> tuple[Analyzer, TermTable]:
    """This process's analyzer and word table (set up by the pool initializer)."""
    analyzer, table = _Worker.analyzer, _Worker.table
    if analyzer is None or table is None:
        raise RuntimeError("counting worker used before initialization")
    return analyzer, table


def new_terms() -> tuple[int, list[str]]:
    """(process id, terms this process's table gained since it last reported)."""
    table = worker_state()[1]
    fresh = table.terms[_Worker.sent :]
    _Worker.sent = len(table.terms)
    return os.getpid(), fresh


def _count_chunk(chunk: tuple[list[str], list[str]]) -> ChunkResult:
    analyzer, table = worker_state()
    body = count_texts(analyzer, table, chunk[0])
    title = count_texts(analyzer, table, chunk[1])
    return (*new_terms(), body, title)


T = TypeVar("T")
R = TypeVar("R")


def run_chunks(
    task: Callable[[T], R], chunks: Iterable[T], analyzer: Analyzer, workers: int
) -> Iterator[R]:
    """Results of `task` on each chunk, in order; in `workers` processes when more than one.

    Tasks see the analyzer and a word table through `worker_state()`. fork shares the
    already-imported modules; results come back in submission order, so the vocabulary
    and every count are the same as with one process.
    """
    config = analyzer.config.to_dict()
    if workers <= 1:
        _init_worker(config)
        for chunk in chunks:
            yield task(chunk)
        return
    method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
    ctx = multiprocessing.get_context(method)
    with ctx.Pool(workers, initializer=_init_worker, initargs=(config,)) as pool:
        pending: deque[Any] = deque()
        for chunk in chunks:
            pending.append(pool.apply_async(task, (chunk,)))
            while len(pending) > 2 * workers:
                yield pending.popleft().get()
        while pending:
            yield pending.popleft().get()


class TermCounter:
    """Per-field (articles x terms) counts over one shared, growing vocabulary."""

    def __init__(self) -> None:
        self.vocab: dict[str, int] = {}
        self.terms: list[str] = []
        self.chunks: dict[str, list[sp.csr_matrix]] = {"body": [], "title": []}
        self._maps: dict[int, np.ndarray] = {}

    def _global_ids(self, names: Iterable[str]) -> np.ndarray:
        """Ids of `names` in the shared vocabulary, new names appended in the order given
        (whole-list dict operations: a counting process reports ~100k new names per chunk)."""
        names = list(names)
        fresh = [t for t, gid in zip(names, map(self.vocab.get, names), strict=True) if gid is None]
        # dict.fromkeys: a name given twice gets one id, at its first place.
        fresh = list(dict.fromkeys(fresh))
        start = len(self.terms)
        self.vocab.update(zip(fresh, range(start, start + len(fresh)), strict=True))
        self.terms.extend(fresh)
        return np.fromiter(map(self.vocab.__getitem__, names), np.int64, len(names))

    def add_result(self, result: ChunkResult) -> None:
        """Merge one counted chunk (its term ids are local to the process that counted it)."""
        pid, fresh, body, title = result
        self.add_parts(pid, fresh, {"body": body, "title": title})

    def add_parts(self, pid: int, fresh: list[str], parts: dict[str, Csr]) -> None:
        """Merge CSR parts counted by process `pid`, which reported `fresh` new terms."""
        known = self._maps.get(pid, np.zeros(0, dtype=np.int64))
        mapping = self._maps[pid] = np.concatenate([known, self._global_ids(fresh)])
        for name, (indptr, local, counts) in parts.items():
            cols = mapping[local].astype(np.int32)
            width = int(cols.max()) + 1 if cols.size else 0
            self.chunks[name].append(
                sp.csr_matrix((counts, cols, indptr), shape=(indptr.size - 1, width))
            )

    def add_counts(self, field: str, matrix: sp.csr_matrix, names: Sequence[str]) -> None:
        """Append already-counted articles (rows of `matrix`, columns named by `names`)."""
        cols = self._global_ids(names)
        m = matrix.tocsr()
        width = int(cols.max()) + 1 if cols.size else 0
        self.chunks[field].append(
            sp.csr_matrix(
                (m.data.astype(np.int32), cols[m.indices], m.indptr), shape=(m.shape[0], width)
            )
        )

    def merge_field(self, other: TermCounter, field: str) -> None:
        """Replace this counter's `field` by `other`'s, mapped onto this vocabulary."""
        cols = self._global_ids(other.terms)
        merged = []
        for c in other.chunks[field]:
            width = int(cols.max()) + 1 if cols.size else 0
            merged.append(
                sp.csr_matrix((c.data, cols[c.indices], c.indptr), shape=(c.shape[0], width))
            )
        self.chunks[field] = merged

    def matrix(self, field: str, order: np.ndarray | None = None) -> sp.csr_matrix:
        """All counted rows of one field as CSR over the vocabulary so far (`order` picks rows)."""
        n_terms = len(self.terms)
        mats = [
            sp.csr_matrix((c.data, c.indices, c.indptr), shape=(c.shape[0], n_terms))
            for c in self.chunks[field]
        ]
        tf = sp.vstack(mats, format="csr") if mats else sp.csr_matrix((0, n_terms), dtype=np.int32)
        return tf[order] if order is not None else tf


def count_articles(
    chunks: Iterable[tuple[list[str], list[str]]], analyzer: Analyzer, workers: int
) -> TermCounter:
    """Count (bodies, titles) chunks, in `workers` processes when more than one."""
    counter = TermCounter()
    for result in run_chunks(_count_chunk, chunks, analyzer, workers):
        counter.add_result(result)
    return counter
