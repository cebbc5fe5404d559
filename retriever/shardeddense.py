"""Dense and hybrid search over a sharded index, merged exactly as one index gives them.

Every shard holds the same vocabulary, word vectors and weights (retriever/shardvectors.py),
so a clue's vector comes out of any shard as the single index makes it. A dense search asks
every shard for its k nearest and merges them by (cosine desc, global row asc), exactly the
single index's order and ties; cosines are computed row by row (`dense.dot`), so they are
the same numbers. Hybrid search (retriever/hybrid.py) then runs on the sharded index itself:
it sees the merged, global BM25 and dense top lists, the BM25 score of every article (the
shards' scores side by side) and the ids and titles by global row, so the fused list equals
the single index's. With an HNSW graph per shard (shards of at least `ann_min_articles`)
the dense lists are approximate, as a big single index's are, but not the same candidates.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, Protocol

import numpy as np

from .dense import DenseSearcher, Mask, Nearest, Queries, dot
from .errors import IndexFormatError


class _Column(Protocol):
    def take(self, rows: np.ndarray) -> list[str]: ...


class DenseShard(Protocol):
    """What dense search needs of one shard (an `Index`)."""

    @property
    def dense(self) -> DenseSearcher | None: ...


def _split(first_rows: np.ndarray, rows: np.ndarray) -> list[tuple[int, np.ndarray]]:
    """(shard, positions in `rows`) for each shard holding some of the global `rows`."""
    which = np.searchsorted(first_rows, rows, side="right") - 1
    return [(int(s), np.flatnonzero(which == s)) for s in np.unique(which)]


class ShardedColumn:
    """One string column (ids, titles) of every shard, by global row."""

    def __init__(self, parts: Sequence[_Column], first_rows: Sequence[int]) -> None:
        self.parts = list(parts)
        self.first = np.asarray(first_rows, dtype=np.int64)

    def take(self, rows: np.ndarray) -> list[str]:
        """The strings of several global rows at once."""
        rows = np.asarray(rows, dtype=np.int64)
        out = [""] * rows.size
        for s, at in _split(self.first, rows):
            values = self.parts[s].take(rows[at] - self.first[s])
            for i, value in zip(at.tolist(), values, strict=True):
                out[i] = value
        return out


# Per shard, per query, its nearest articles as (global rows, cosines), best first; given
# the queries, k, exact, and each shard's part of a filter's row mask (None: no filter).
DenseLists = list[list[Nearest]]
DenseFanOut = Callable[[Queries, int, bool, Sequence[np.ndarray] | None], DenseLists]


def shard_parts(allowed: Sequence[np.ndarray] | None, n_shards: int) -> list[Mask]:
    """Each shard's part of a filter's mask, None for every shard without a filter."""
    return [None] * n_shards if allowed is None else list(allowed)


def shifted(
    searcher: DenseSearcher, first_row: int, queries: Queries, k: int, exact: bool, allowed: Mask
) -> list[Nearest]:
    """One shard's k nearest per query vector, rows counted over the whole corpus."""
    found = searcher.search(queries, k, exact=exact, allowed=allowed)
    return [(rows + first_row, scores) for rows, scores in found]


def merge_nearest(per_shard: Sequence[Sequence[tuple[np.ndarray, ...]]], k: int) -> list[Any]:
    """Per query, the shards' nearest merged by (cosine desc, global row asc), as one index
    orders them, cut to k; each entry's further arrays (BM25 scores) follow their rows."""
    out = []
    for q in range(len(per_shard[0]) if per_shard else 0):
        cols = [
            np.concatenate([lists[q][c] for lists in per_shard])
            for c in range(len(per_shard[0][q]))
        ]
        rows, scores = cols[0].astype(np.int64), cols[1].astype(np.float64)
        order = np.lexsort((rows, -scores))[:k]
        out.append((rows[order], scores[order], *(c[order] for c in cols[2:])))
    return out


class ShardedDense(DenseSearcher):
    """`DenseSearcher`'s search and cosines over every shard's article vectors.

    The shards' searches go through `fan_out` (default: the searchers here, one after the
    other; api/rayserve.py: the shard deployments); the clue's vector is made here, once,
    from the shared word vectors, and the cosines of a few rows are read here too.
    """

    def __init__(
        self,
        searchers: Sequence[DenseSearcher],
        first_rows: Sequence[int],
        fan_out: DenseFanOut | None = None,
        generation: str = "",
    ) -> None:
        # Any shard's words and weights make the clue's vector: they are the same arrays.
        super().__init__(searchers[0].vectors)
        self.searchers = list(searchers)
        self.first = np.asarray(first_rows, dtype=np.int64)
        self._fan_out = fan_out if fan_out is not None else self._search_here
        self.generation = generation  # the shards' vector generation ("" their own)

    @classmethod
    def of(
        cls,
        shards: Sequence[DenseShard],
        first_rows: Sequence[int],
        fan_out: DenseFanOut | None = None,
        generation: str = "",
    ) -> ShardedDense | None:
        """The shards' dense search, None when built without vectors; refused when only
        some shards have vectors or their word vectors differ."""
        searchers = [s.dense for s in shards]
        if all(d is None for d in searchers):
            return None
        words = [d.vectors.n_words if d is not None else -1 for d in searchers]
        if any(w != words[0] for w in words):
            raise IndexFormatError(
                "the shards do not share one set of word vectors; rebuild the sharded index"
            )
        return cls([d for d in searchers if d is not None], first_rows, fan_out, generation)

    def _search_here(
        self, queries: Queries, k: int, exact: bool, allowed: Sequence[np.ndarray] | None
    ) -> DenseLists:
        parts = shard_parts(allowed, len(self.searchers))
        return [
            shifted(s, first, queries, k, exact, part)
            for s, first, part in zip(self.searchers, self.first.tolist(), parts, strict=True)
        ]

    @property
    def approximate(self) -> bool:
        """True when any shard searches an HNSW graph."""
        return any(s.approximate for s in self.searchers)

    def split(self, allowed: np.ndarray) -> list[np.ndarray]:
        """Each shard's part of a row mask over the whole corpus."""
        ends = [*self.first.tolist()[1:], allowed.shape[0]]
        return [allowed[a:b] for a, b in zip(self.first.tolist(), ends, strict=True)]

    def _nearest(self, queries: Queries, k: int, exact: bool, allowed: Mask) -> list[Nearest]:
        """Each query's k nearest over all shards, merged by (cosine desc, global row asc)
        as one index orders them; with `allowed`, each shard is given its part."""
        parts = None if allowed is None else self.split(allowed)
        return merge_nearest(self._fan_out(queries, k, exact, parts), k)

    def cosines(self, query: np.ndarray | None, rows: np.ndarray) -> np.ndarray:
        """Cosine of a query vector with some articles by global row (0 where none)."""
        rows = np.asarray(rows, dtype=np.int64)
        if query is None or rows.size == 0:
            return np.zeros(rows.size)
        out = np.zeros(rows.size)
        for s, at in _split(self.first, rows):
            docvec = self.searchers[s].vectors.docvec
            out[at] = dot(docvec[rows[at] - self.first[s]], query)
        return out
