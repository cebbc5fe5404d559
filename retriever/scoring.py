"""Query-time BM25 scoring over term-major postings, with exact top-k pruning.

Hand-written rather than a scipy sparse product: scoring only the postings of the query's
terms into a reused dense buffer keeps a query's cost proportional to its postings, and the
MaxScore-style bound (Turtle and Flood 1995) lets the common terms be looked up only for the
few articles that can still reach the top k, without changing any returned score or rank.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import numpy as np

# Posting budget of the first scoring round; it doubles each round (common practice, no source).
FIRST_ROUND = 4096


class Postings(Protocol):
    """What scoring needs from one field's arrays."""

    indptr: np.ndarray
    docs: np.ndarray
    weight: np.ndarray
    max_weight: np.ndarray


@dataclass(frozen=True)
class Plan:
    """The query's (field, term) posting ranges, strongest upper bound first."""

    fields: tuple[Postings, ...]
    field: np.ndarray  # index into `fields`, per segment
    start: np.ndarray
    length: np.ndarray
    factor: np.ndarray  # query term count x field weight
    bound: np.ndarray  # largest contribution the segment can make to one article

    @property
    def size(self) -> int:
        """Number of segments."""
        return int(self.start.size)


def plan(fields: list[tuple[Postings, float]], tids: np.ndarray, qtf: np.ndarray) -> Plan:
    """Segments of the known query terms in every scored field, ordered by bound."""
    parts = []
    for i, (fld, scale) in enumerate(fields):
        start = fld.indptr[tids]
        length = fld.indptr[tids + 1] - start
        factor = qtf * scale
        keep = length > 0
        parts.append((np.full(int(keep.sum()), i), start[keep], length[keep], factor[keep],
                      fld.max_weight[tids[keep]] * factor[keep]))
    field, start, length, factor, bound = (np.concatenate(c) for c in zip(*parts, strict=True))
    order = np.argsort(-bound, kind="stable")
    return Plan(tuple(f for f, _ in fields), field[order], start[order], length[order],
                factor[order], bound[order])


def _ranges(start: np.ndarray, length: np.ndarray) -> np.ndarray:
    """Concatenation of arange(s, s + n) for each (s, n), as one index array."""
    total = int(length.sum())
    offsets = np.cumsum(length) - length
    return np.repeat(start - offsets, length) + np.arange(total)


def scatter(buf: np.ndarray, p: Plan, lo: int, hi: int) -> np.ndarray:
    """Add segments lo..hi-1 into `buf` (each article's terms in plan order); returns the rows hit."""
    touched = []
    for f in np.unique(p.field[lo:hi]).tolist():
        fld = p.fields[f]
        sel = np.flatnonzero(p.field[lo:hi] == f) + lo
        if sel.size == 1:
            s, n = int(p.start[sel[0]]), int(p.length[sel[0]])
            docs, w = fld.docs[s : s + n], fld.weight[s : s + n]
        else:
            idx = _ranges(p.start[sel], p.length[sel])
            docs, w = fld.docs[idx], fld.weight[idx]
        factor = p.factor[sel]
        if np.any(factor != 1.0):
            w = w * np.repeat(factor, p.length[sel])
        np.add.at(buf, docs, w)
        touched.append(docs)
    return touched[0] if len(touched) == 1 else np.concatenate(touched)


def _distinct(rows: np.ndarray, n_docs: int) -> np.ndarray:
    if rows.size * 8 < n_docs:
        return np.unique(rows)
    mark = np.zeros(n_docs, dtype=bool)
    mark[rows] = True
    return np.flatnonzero(mark)


def _add_for(buf: np.ndarray, p: Plan, i: int, rows: np.ndarray) -> None:
    """Add segment i's weights for the given (sorted) rows only, by binary search."""
    fld = p.fields[int(p.field[i])]
    s, n = int(p.start[i]), int(p.length[i])
    docs = fld.docs[s : s + n]
    pos = np.searchsorted(docs, rows)
    pos[pos == n] = n - 1
    hit = docs[pos] == rows
    if hit.any():
        buf[rows[hit]] += fld.weight[s + pos[hit]] * p.factor[i]


def top_k(buf: np.ndarray, p: Plan, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Rows and scores of the k best articles (ties by row); `buf` is zero on entry and exit."""
    n_docs = buf.size
    # Bounds are only valid for non-negative weights (a floored IDF can be negative).
    prune = bool(p.bound.min() >= 0) and p.size > 1
    rest = np.concatenate([np.cumsum(p.bound[::-1])[::-1], [0.0]])
    hits: list[np.ndarray] = []
    done, budget = 0, FIRST_ROUND
    cand: np.ndarray | None = None
    try:
        while done < p.size:
            end = done + 1
            postings = int(p.length[done])
            while prune and end < p.size and postings + int(p.length[end]) <= budget:
                postings += int(p.length[end])
                end += 1
            if not prune:
                end = p.size
            hits.append(scatter(buf, p, done, end))
            done, budget = end, budget * 2
            if done == p.size:
                break
            seen = _distinct(np.concatenate(hits), n_docs)
            if seen.size < k:
                continue
            partial = buf[seen]
            theta = float(np.partition(partial, seen.size - k)[seen.size - k])
            margin = 1e-9 * (abs(theta) + float(rest[done]))
            # Articles not yet hit score at most rest[done]; stop widening once that cannot
            # reach the k-th best partial score, then finish only the articles that still can.
            if rest[done] + margin < theta:
                cand = seen[partial + rest[done] + margin >= theta]
                for i in range(done, p.size):
                    _add_for(buf, p, i, cand)
                break
        if cand is None:
            cand = _distinct(np.concatenate(hits), n_docs)
        scores = buf[cand]
        if cand.size > k:
            kth = np.partition(scores, cand.size - k)[cand.size - k]
            top = scores >= kth
            cand, scores = cand[top], scores[top]
        order = np.lexsort((cand, -scores))[:k]
        return cand[order], scores[order]
    finally:
        for rows in hits:
            buf[rows] = 0.0
