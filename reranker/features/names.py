"""Names of the candidates as the features see them: qualifiers, title and alias tokens.

Each row is analyzed the first time it is a candidate and remembered with its index, so a
large index costs nothing up front.
"""

from __future__ import annotations

import weakref
from collections import Counter
from collections.abc import Sequence
from typing import Any, NamedTuple

import numpy as np

from retriever import Index

_CACHES: dict[int, dict[Any, Any]] = {}


def index_cache(index: Index) -> dict[Any, Any]:
    """A dict of derived values that lives as long as `index` (title tokens and the like)."""
    # Keyed by id() with a finalizer instead of a WeakKeyDictionary: this runs several times
    # per clue, and a plain dict lookup is much cheaper than building a weak reference.
    cache = _CACHES.get(id(index))
    if cache is None:
        cache = _CACHES[id(index)] = {}
        weakref.finalize(index, _CACHES.pop, id(index), None)
    return cache


class RowNames(NamedTuple):
    """What the name features need of one row; token tuples hold distinct tokens, in order.

    Tuples rather than frozensets: a tuple of strings costs less memory and the garbage
    collector stops tracking it, which matters when a large index has most rows cached.
    """

    qualifier: str
    base: tuple[str, ...]
    qualifier_tokens: tuple[str, ...]
    aliases: tuple[str, ...]
    qualifier_count: int  # titles in the corpus with this qualifier, 0 when unqualified
    tokens: tuple[str, ...]  # all of the above tokens


def row_names(index: Index, rows: Sequence[int]) -> list[RowNames]:
    """RowNames of `rows`; each row is analyzed on first use and remembered with the index.

    Only the rows asked for are analyzed, so a large index costs nothing up front.
    """
    cache = index_cache(index)
    table: list[RowNames | None] | None = cache.get("row_names")
    if table is None:
        table = cache["row_names"] = [None] * len(index)
    out = [table[r] for r in rows]
    if None in out:
        missing = [r for r, e in zip(rows, out, strict=True) if e is None]
        _analyze_rows(index, table, list(dict.fromkeys(missing)))
        out = [table[r] for r in rows]
    return out  # type: ignore[return-value]


def _analyze_rows(index: Index, table: list[RowNames | None], rows: list[int]) -> None:
    for r, (q, count, base, qual, alias) in zip(rows, analyze_names(index, rows), strict=True):
        table[r] = RowNames(q, base, qual, alias, count, tuple(dict.fromkeys(base + qual + alias)))


# (qualifier, titles sharing it or 0, base-name tokens, qualifier tokens, alias tokens)
NameTokens = tuple[str, int, tuple[str, ...], tuple[str, ...], tuple[str, ...]]


def analyze_names(index: Index, rows: Sequence[int] | np.ndarray) -> list[NameTokens]:
    """Per row: its qualifier, how many titles carry that qualifier (0 when unqualified), and
    its base-name, qualifier and alias tokens, each tuple distinct and in order. All the
    rows' names go through the analyzer in one call."""
    picked = np.asarray(rows, dtype=np.int64)
    quals = index.qualifiers.take(picked)
    texts = index.bases.take(picked) + quals
    texts += [" ".join(a) for a in index.aliases.take(picked)]
    toks = [tuple(dict.fromkeys(t)) for t in index.analyzer.tokens_many(texts)]
    counts, m = qualifier_counts(index), len(quals)
    return [
        (q, counts.get(q, 0) if q else 0, toks[j], toks[m + j], toks[2 * m + j])
        for j, q in enumerate(quals)
    ]


def qualifier_counts(index: Index) -> dict[str, int]:
    """How many titles carry each qualifier (one pass over the qualifiers, once per index)."""
    cache = index_cache(index)
    counts: dict[str, int] | None = cache.get("qualifier_counts")
    if counts is None:
        counter = Counter(index.qualifiers)
        counter.pop("", None)
        counts = cache["qualifier_counts"] = dict(counter)
    return counts
