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
from typing import Protocol

import numpy as np

from .dense import DenseSearcher, dot
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


# Per query, each shard's nearest articles as (global rows, cosines), best first; given the
# queries, k, exact, and each shard's part of a filter's row mask (None: no filter).
DenseLists = list[list[tuple[np.ndarray, np.ndarray]]]
DenseFanOut = Callable[
    [Sequence[np.ndarray | None], int, bool, Sequence[np.ndarray] | None], DenseLists
]


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
    ) -> None:
        # Any shard's words and weights make the clue's vector: they are the same arrays.
        super().__init__(searchers[0].vectors)
        self.searchers = list(searchers)
        self.first = np.asarray(first_rows, dtype=np.int64)
        self._fan_out = fan_out if fan_out is not None else self._search_here

    @classmethod
    def of(
        cls,
        shards: Sequence[DenseShard],
        first_rows: Sequence[int],
        fan_out: DenseFanOut | None = None,
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
        return cls([d for d in searchers if d is not None], first_rows, fan_out)

    def _search_here(
        self,
        queries: Sequence[np.ndarray | None],
        k: int,
        exact: bool,
        allowed: Sequence[np.ndarray] | None,
    ) -> DenseLists:
        return [
            [
                (rows + first, scores)
                for rows, scores in s.search(
                    queries, k, exact=exact, allowed=None if allowed is None else allowed[i]
                )
            ]
            for i, (s, first) in enumerate(zip(self.searchers, self.first.tolist(), strict=True))
        ]

    @property
    def approximate(self) -> bool:
        """True when any shard searches an HNSW graph."""
        return any(s.approximate for s in self.searchers)

    def split(self, allowed: np.ndarray) -> list[np.ndarray]:
        """Each shard's part of a row mask over the whole corpus."""
        ends = [*self.first.tolist()[1:], allowed.shape[0]]
        return [allowed[a:b] for a, b in zip(self.first.tolist(), ends, strict=True)]

    def search(
        self,
        queries: Sequence[np.ndarray | None],
        k: int,
        *,
        exact: bool = False,
        allowed: np.ndarray | None = None,
    ) -> list[tuple[np.ndarray, np.ndarray]]:
        """(global rows, cosines) of each query's k nearest articles over all shards, merged
        by (cosine desc, global row asc) as one index orders them; `allowed` (bool, one per
        article): only the rows it keeps, each shard given its part."""
        if k < 1:
            raise ValueError(f"k must be at least 1, got {k}")
        parts = None if allowed is None else self.split(allowed)
        per_shard = self._fan_out(queries, k, exact, parts)
        out = []
        for q in range(len(queries)):
            rows = np.concatenate([lists[q][0] for lists in per_shard]).astype(np.int64)
            scores = np.concatenate([lists[q][1] for lists in per_shard]).astype(np.float64)
            order = np.lexsort((rows, -scores))[:k]
            out.append((rows[order], scores[order]))
        return out

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
