"""Query-time BM25 scoring over term-major postings, and an exact top-k.

Hand-written around scipy's compiled CSC mat-vec kernel rather than a scipy sparse product
over the whole matrix: the kernel is pointed at just the query terms' posting ranges (one
"column" per range), so a query costs time proportional to its postings, not to the corpus
or the vocabulary, and no per-article or per-posting Python code runs.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Any, Protocol

import numpy as np

_matvec: Any
try:
    # Private but long-stable module (the kernels behind csc_matrix @ vector); if a future
    # scipy drops it, the numpy path below gives the same scores, about half as fast.
    from scipy.sparse import _sparsetools

    _matvec = _sparsetools.csc_matvec
except (ImportError, AttributeError):  # pragma: no cover - depends on the scipy build
    _matvec = None

_INT32_MAX = np.iinfo(np.int32).max


class Postings(Protocol):
    """What scoring needs from one field's arrays."""

    indptr: np.ndarray
    docs: np.ndarray
    weight: np.ndarray


@dataclass(frozen=True)
class Plan:
    """The posting ranges of a query's known terms in each scored field."""

    fields: tuple[Postings, ...]
    start: tuple[np.ndarray, ...]  # per field, ranges in descending start order
    end: tuple[np.ndarray, ...]
    factor: tuple[np.ndarray, ...]  # query term count x field weight

    @cached_property
    def postings(self) -> int:
        """Total postings the query touches."""
        return int(sum(int((e - s).sum()) for s, e in zip(self.start, self.end, strict=True)))


def plan(fields: list[tuple[Postings, float]], tids: np.ndarray, qtf: np.ndarray) -> Plan:
    """Posting ranges of the known query terms (`tids`, counted `qtf` times) in every field."""
    starts, ends, factors = [], [], []
    for fld, scale in fields:
        start, end = fld.indptr[tids], fld.indptr[tids + 1]
        keep = end > start
        order = np.argsort(-start[keep], kind="stable")
        starts.append(start[keep][order])
        ends.append(end[keep][order])
        factors.append((qtf[keep] * scale)[order].astype(np.float64))
    return Plan(tuple(f for f, _ in fields), tuple(starts), tuple(ends), tuple(factors))


def concat_ranges(start: np.ndarray, length: np.ndarray) -> np.ndarray:
    """Concatenation of arange(s, s + n) for each (s, n), as one index array."""
    offsets = np.cumsum(length) - length
    return np.repeat(start - offsets, length) + np.arange(int(length.sum()))


def accumulate(buf: np.ndarray, p: Plan, *, use_kernel: bool = True) -> None:
    """Add every planned posting's weight x factor into `buf` (float32, one slot per article)."""
    for fld, start, end, factor in zip(p.fields, p.start, p.end, p.factor, strict=True):
        if start.size == 0:
            continue
        if use_kernel and _matvec is not None and fld.docs.size < _INT32_MAX:
            # Columns 2i are the ranges, with weight factor[i]; columns 2i+1 run from one range's
            # end back to the next range's (lower) start, so they are empty and cost nothing.
            bounds = np.empty(2 * start.size, dtype=np.int32)
            bounds[0::2], bounds[1::2] = start, end
            x = np.zeros(2 * start.size - 1, dtype=buf.dtype)
            x[0::2] = factor
            _matvec(buf.size, x.size, bounds, fld.docs, fld.weight, x, buf)
        else:
            # Term by term in the same order, so both paths add in the same sequence.
            for s, e, f in zip(start.tolist(), end.tolist(), factor.tolist(), strict=True):
                buf[fld.docs[s:e]] += fld.weight[s:e] * f


def _floor(buf: np.ndarray, p: Plan, k: int) -> float | None:
    """A score the k-th best article surely reaches, or None when no term has k postings.

    The k-th best score among the articles of one term (the rarest with at least k
    postings, whose rows are distinct) is reached by at least k articles.
    """
    best: tuple[int, int, int] | None = None  # (length, field, start)
    # Plain Python over the few query terms: cheaper than numpy calls on arrays this small.
    for fi, (start, end) in enumerate(zip(p.start, p.end, strict=True)):
        for s, e in zip(start.tolist(), end.tolist(), strict=True):
            n = e - s
            if n >= k and (best is None or n < best[0]):
                best = (n, fi, s)
    if best is None:
        return None
    n, fi, s = best
    vals = buf[p.fields[fi].docs[s : s + n]]
    return float(np.partition(vals, n - k)[n - k])


def _touched(p: Plan) -> np.ndarray:
    """Rows holding any planned posting, as concatenated (possibly repeated) indices."""
    parts = [
        fld.docs[concat_ranges(s, e - s)]
        for fld, s, e in zip(p.fields, p.start, p.end, strict=True)
    ]
    return np.concatenate(parts)


def top_k(buf: np.ndarray, p: Plan, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Rows and scores of the k best articles with a non-zero score (ties by row).

    `buf` must be all zeros on entry and is all zeros again on return.
    """
    small = p.postings * 4 < buf.size
    touched = _touched(p) if small else None
    try:
        accumulate(buf, p)
        floor = _floor(buf, p, k)
        if floor is not None and floor > 0:
            # Only articles scoring at least `floor` can be in the top k; no other is sorted.
            cand = np.flatnonzero(buf >= floor)
        else:
            cand = np.unique(touched) if touched is not None else np.arange(buf.size)
            cand = cand[buf[cand] != 0]
        scores = buf[cand]
        if cand.size > k:
            kth = np.partition(scores, cand.size - k)[cand.size - k]
            top = scores >= kth
            cand, scores = cand[top], scores[top]
        order = np.lexsort((cand, -scores))[:k]
        return cand[order], scores[order]
    finally:
        if touched is not None:
            buf[touched] = 0.0
        else:
            buf.fill(0.0)
