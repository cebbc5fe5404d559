"""The clue's body terms and which of them each candidate's article holds."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from retriever import Index

from .names import index_cache
from .registry import CandidateSet

# Remembered (token -> term id and rarity) lookups per index; cleared past this many.
_MAX_CACHED_TERMS = 200_000


def body_terms(index: Index, tokens: Sequence[str]) -> list[tuple[int, float]]:
    """(term id, log(N/df)) of each distinct token found in article text, in order.

    Tokens absent from the vocabulary, or only in titles, are left out. Lookups are
    remembered per index, so a clue costs dict lookups instead of a vocabulary search.
    """
    cache = index_cache(index)
    known: dict[str, tuple[int, float] | None] | None = cache.get("body_terms")
    if known is None or len(known) > _MAX_CACHED_TERMS:
        known = cache["body_terms"] = {}
    distinct = dict.fromkeys(tokens)
    try:
        return [r for r in map(known.__getitem__, distinct) if r is not None]
    except KeyError:  # some tokens not seen before: look them up below
        new = [t for t in distinct if t not in known]
    indptr = index.body.indptr
    ids = [index.term_ids([t])[0] for t in new]
    tids = np.array([int(i[0]) if i.size else 0 for i in ids], dtype=np.int64)
    starts, ends = indptr[tids], indptr[tids + 1]
    rarity = np.log(max(index.n_docs, 1) / np.maximum(ends - starts, 1).astype(np.float64))
    for t, i, tid, s, e, r in zip(
        new, ids, tids.tolist(), starts.tolist(), ends.tolist(), rarity.tolist(), strict=True
    ):
        known[t] = (tid, r) if i.size and e > s else None
    return [r for r in map(known.__getitem__, distinct) if r is not None]


def matched(cs: CandidateSet) -> tuple[np.ndarray, np.ndarray, int]:
    """(distinct clue terms in each candidate, their summed log(N/df), known clue terms)."""
    cached = cs.memo.get("matched")
    if cached is None:
        cached = cs.memo["matched"] = _match(cs)
    return cached


def _match(cs: CandidateSet) -> tuple[np.ndarray, np.ndarray, int]:
    n = len(cs)
    terms = body_terms(cs.index, cs.tokens)
    if not terms or n == 0:
        return np.zeros(n), np.zeros(n), len(terms)
    # The index's article-major term lists say which clue terms each candidate holds (one
    # compiled call for all candidates).
    pairs = np.array(sorted(terms))  # (term id, rarity) rows, by term id
    count, weight = cs.index.term_overlap(cs.rows, pairs[:, 0].astype(np.int64), pairs[:, 1])
    return count, weight, len(terms)
