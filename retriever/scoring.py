"""Query-time BM25 scoring over term-major postings, and an exact top-k, for one or many queries.

A query plan lists, for every query of a batch, its known terms and how often each occurs;
every scored field's postings of those terms are added. The compiled kernel
(retriever/_kernels.c) adds a whole batch's postings and selects each query's k best
articles in one call, releasing the GIL when the call is big enough to pay for it. Where
that module is not built, the numpy path below gives the same scores bit for bit (the same
products, added in the same order), more slowly; tests compare the two.
"""

from __future__ import annotations

import importlib
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

_kernels: Any
try:
    _kernels = importlib.import_module("retriever._kernels")  # built by setup.py from _kernels.c
except ImportError:  # pragma: no cover - a machine without a C compiler at install time
    _kernels = None


def compiled() -> bool:
    """True when the compiled kernel is built and used."""
    return _kernels is not None


class Postings(Protocol):
    """What scoring needs from one field's arrays."""

    indptr: np.ndarray
    docs: np.ndarray
    weight: np.ndarray


@dataclass(frozen=True)
class Plan:
    """The known terms of a batch of queries, in scoring order.

    Query q owns entries `qptr[q]:qptr[q + 1]` of `tids` (distinct term ids, by descending
    id) and `qtf` (how often each occurs in the query). Every field's postings of those
    terms are added, field by field in order, each scaled by the field's weight.
    """

    fields: tuple[tuple[Postings, float], ...]
    qptr: np.ndarray  # int64, n_queries + 1
    tids: np.ndarray  # int64
    qtf: np.ndarray  # float64

    @property
    def n_queries(self) -> int:
        return int(self.qptr.size - 1)


def plan(fields: Sequence[tuple[Postings, float]], queries: Sequence[Sequence[int]]) -> Plan:
    """Plan for queries given as term ids (one per token; negative ids, unknown terms, dropped).

    A term occurring twice in a query is added once with twice the weight, as in BM25's
    query term frequency. Plain Python: for a few dozen terms per query it is cheaper than
    numpy's sorting and counting calls.
    """
    qptr, tids, qtf = [0], [], []
    for ids in queries:
        counts: dict[int, int] = {}
        for t in ids:
            if t >= 0:
                counts[t] = counts.get(t, 0) + 1
        for t in sorted(counts, reverse=True):
            tids.append(t)
            qtf.append(counts[t])
        qptr.append(len(tids))
    return Plan(
        tuple(fields),
        np.array(qptr, dtype=np.int64),
        np.array(tids, dtype=np.int64),
        np.array(qtf, dtype=np.float64),
    )


def concat_ranges(start: np.ndarray, length: np.ndarray) -> np.ndarray:
    """Concatenation of arange(s, s + n) for each (s, n), as one index array."""
    offsets = np.cumsum(length) - length
    return np.repeat(start - offsets, length) + np.arange(int(length.sum()))


def accumulate(buf: np.ndarray, p: Plan, q: int = 0) -> None:
    """Add query q's postings, weight x factor, into `buf` (one slot per article).

    Each product is rounded to the weight type and added in plan order, as the kernel does.
    """
    lo, hi = int(p.qptr[q]), int(p.qptr[q + 1])
    for fld, scale in p.fields:
        for tid, tf in zip(p.tids[lo:hi].tolist(), p.qtf[lo:hi].tolist(), strict=True):
            s, e = int(fld.indptr[tid]), int(fld.indptr[tid + 1])
            buf[fld.docs[s:e]] += fld.weight[s:e] * buf.dtype.type(tf * scale)


def top_k_many(
    buf: np.ndarray,
    p: Plan,
    k: int,
    *,
    touched: np.ndarray | None = None,
    use_kernel: bool = True,
    prune: bool | None = None,
    work: np.ndarray | None = None,
    allowed: np.ndarray | None = None,
) -> list[tuple[np.ndarray, np.ndarray]]:
    """Rows (int64) and scores (float64) of each query's k best articles with a non-zero
    score, best first, ties by row; with `allowed` (bool, one per article), only among the
    rows it keeps, before the cut to k (fewer than k come back when fewer match).

    `buf` (the weights' type, one slot per article) must be all zeros on entry and is all
    zeros again on return. `touched` (int32, one slot per article) is the kernel's scratch;
    pass one to reuse it across calls. `prune`: use the windowed kernel, which skips
    postings that cannot change the result (None: where `prunable` says it pays; True:
    wherever the index has the bounds; False: never); the result is the same either way.
    `work` (int64, one per query), filled by the kernel only: the postings each query read.
    """
    if k < 1:
        raise ValueError(f"k must be at least 1, got {k}")
    n = p.n_queries
    # The kernel takes a row mask on its windowed path only (float32 weights with bounds,
    # prune not False);
    # other filtered queries run the numpy twin, which gives the same scores bit for bit and
    # drops the masked rows before its top-k cut.
    masked_ok = allowed is None or (prune is not False and prunable(p, None))
    if use_kernel and _kernels is not None and masked_ok:
        rows = np.empty(n * k, dtype=np.int64)
        scores = np.empty(n * k, dtype=np.float64)
        counts = np.empty(n, dtype=np.int64)
        use_bounds = allowed is not None or (
            prune is not False and prunable(p, buf.size if prune is None else None)
        )
        fields = tuple(
            (fld.indptr, fld.docs, fld.weight, float(sc))
            + ((fld.bounds.term_max, fld.bounds.block_max) if use_bounds else ())  # type: ignore[attr-defined]
            for fld, sc in p.fields
        )
        if touched is None:
            touched = np.empty(buf.size, dtype=np.int32)
        _kernels.search(
            buf,
            touched,
            k,
            fields,
            p.qptr,
            p.tids,
            p.qtf,
            rows,
            scores,
            counts,
            use_bounds,
            work,
            None if allowed is None else np.ascontiguousarray(allowed, dtype=bool),
        )
        return [
            (rows[q * k : q * k + c], scores[q * k : q * k + c])
            for q, c in enumerate(counts.tolist())
        ]
    return [_numpy_top_k(buf, p, q, k, allowed) for q in range(n)]


# The windowed path (retriever/_daat.h: rows in windows of 8192 with MaxScore over block
# maxima) is the default from PRUNE_MIN_ARTICLES articles. It visits rows in windows whose
# sums stay in the CPU cache, where the exhaustive kernel's buffer (4 bytes per article)
# no longer does: on the benchmark's clues (tests/benchmarks/bench_retrieval.py, ~16
# terms, k=10) its kernel CPU time per query was 0.68-0.72x the exhaustive one's at 1M
# articles, and 1.03-1.15x at 100k (a 400 KB buffer fits this machine's 2 MB L2 per core),
# so small indexes keep the exhaustive kernel. The cut sits where the buffer reaches 1 MB.
# Both paths give the same hits bit for bit (tests/retriever/test_pruning.py,
# test_windowed.py).
PRUNE_MIN_ARTICLES: int | None = 250_000  # the windowed path from this corpus size; None: never


def prunable(p: Plan, n_docs: int | None) -> bool:
    """Whether the kernel may prune this plan's queries: a corpus of `n_docs` articles big
    enough (None: any size), and every field with stored weight maxima over float32 weights
    (never negative, see postings.weight_dtype; float64 ones may be, which the bounds
    cannot handle).

    The kernel then decides per window of rows (retriever/_daat.h) whether to skip it,
    prune it with MaxScore or add every posting in it.
    """
    if n_docs is not None and (PRUNE_MIN_ARTICLES is None or n_docs < PRUNE_MIN_ARTICLES):
        return False
    return all(
        getattr(fld, "bounds", None) is not None and fld.weight.dtype == np.float32
        for fld, _ in p.fields
    )


def _numpy_top_k(
    buf: np.ndarray, p: Plan, q: int, k: int, allowed: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """The numpy path of top_k_many for query q: touched articles, their scores, a partial sort."""
    lo, hi = int(p.qptr[q]), int(p.qptr[q + 1])
    ranges = [
        (fld, int(fld.indptr[t]), int(fld.indptr[t + 1]))
        for fld, _ in p.fields
        for t in p.tids[lo:hi].tolist()
    ]
    postings = sum(e - s for _, s, e in ranges)
    if postings == 0:
        return np.empty(0, dtype=np.int64), np.empty(0)
    # As in the kernel: list the touched articles when they are few, else scan them all.
    touched = (
        np.unique(np.concatenate([fld.docs[s:e] for fld, s, e in ranges])).astype(np.int64)
        if postings * 2 < buf.size
        else None
    )
    try:
        accumulate(buf, p, q)
        if touched is None:
            cand = np.flatnonzero(buf)
            scores = buf[cand].astype(np.float64)
        else:
            scores = buf[touched].astype(np.float64)
            keep = scores != 0
            cand, scores = touched[keep], scores[keep]
        if allowed is not None:
            keep = allowed[cand]
            cand, scores = cand[keep], scores[keep]
        if cand.size > k:
            kth = np.partition(scores, cand.size - k)[cand.size - k]
            top = scores >= kth
            cand, scores = cand[top], scores[top]
        order = np.lexsort((cand, -scores))[:k]
        return cand[order], scores[order]
    finally:
        if touched is None:
            buf.fill(0)
        else:
            buf[touched] = 0


def article_terms(
    indptr: np.ndarray, terms: np.ndarray, rows: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The term lists of `rows` in article-major arrays: (all of them concatenated, how
    many belong to each row)."""
    rows = np.asarray(rows, dtype=np.int64)
    starts, ends = indptr[rows], indptr[rows + 1]
    lengths = ends - starts
    return terms[concat_ranges(starts, lengths)], lengths


def overlap(
    indptr: np.ndarray,
    terms: np.ndarray,
    rows: np.ndarray,
    tids: np.ndarray,
    weights: np.ndarray,
    *,
    use_kernel: bool = True,
) -> tuple[np.ndarray, np.ndarray]:
    """For each row of article-major term lists (`indptr`, `terms`: sorted within a row),
    how many of `tids` (sorted, distinct) it holds and the sum of their `weights`.

    float64 arrays, one entry per row; weights are added in increasing term order.
    """
    rows = np.ascontiguousarray(rows, dtype=np.int64)
    tids = np.ascontiguousarray(tids, dtype=np.int64)
    weights = np.ascontiguousarray(weights, dtype=np.float64)
    n = rows.size
    if use_kernel and _kernels is not None:
        count, total = np.empty(n), np.empty(n)
        _kernels.overlap(indptr, terms, rows, tids, weights, count, total)
        return count, total
    if tids.size == 0 or n == 0:
        return np.zeros(n), np.zeros(n)
    held, lengths = article_terms(indptr, terms, rows)
    pos = np.minimum(np.searchsorted(tids, held), tids.size - 1)
    hit = tids[pos] == held
    owner = np.repeat(np.arange(n), lengths)[hit]
    count = np.bincount(owner, minlength=n).astype(np.float64)
    return count, np.bincount(owner, weights=weights[pos[hit]], minlength=n)


def score_rows(p: Plan, rows: np.ndarray, dtype: np.dtype[Any], q: int = 0) -> np.ndarray:
    """Query q's scores of `rows` only, bit for bit what `accumulate` gives those rows.

    A term's postings list its articles in ascending row order, so each term's postings of
    `rows` are found by binary search; products are rounded to `dtype` and added term by
    term in plan order, as `accumulate` adds them. Costs about (terms x fields) searches
    of len(rows) instead of a pass over every posting of the query (a hybrid set's BM25
    scores for the few articles only the vectors proposed).
    """
    rows = np.asarray(rows, dtype=np.int64)
    out = np.zeros(rows.size, dtype=dtype)
    lo, hi = int(p.qptr[q]), int(p.qptr[q + 1])
    for fld, scale in p.fields:
        for tid, tf in zip(p.tids[lo:hi].tolist(), p.qtf[lo:hi].tolist(), strict=True):
            s, e = int(fld.indptr[tid]), int(fld.indptr[tid + 1])
            if e == s:
                continue
            docs = fld.docs[s:e]
            at = np.searchsorted(docs, rows)
            inside = at < e - s
            found = np.zeros(rows.size, dtype=bool)
            found[inside] = docs[at[inside]] == rows[inside]
            out[found] += fld.weight[s + at[found]] * out.dtype.type(tf * scale)
    return out
