"""How a sharded index's searches reach its shards: the `FanOut` a `ShardedView` asks.

Each method gives one entry per shard, in shard order, rows counted over the whole corpus:
BM25's top k for analysed terms, the nearest articles for query vectors made by the caller,
and the BM25 scores of a few rows. `LocalShards` asks the shards opened in this process one
after the other; api/rayserve.py sends the same calls to one Ray Serve deployment per shard,
whose replicas answer with `local_search`, `local_dense` and `Index.bm25_of_rows`.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Protocol

import numpy as np

from .errors import IndexFormatError
from .index import Index
from .shardeddense import DenseLists

# Per query, best first: (score, global row).
Scored = list[tuple[float, int]]


def local_search(
    shard: Index,
    first_row: int,
    token_lists: Sequence[Sequence[str]],
    k: int,
    allowed: np.ndarray | None = None,
) -> list[Scored]:
    """One shard's top k per query, rows counted over the whole corpus; with `allowed` (the
    shard's part of a filter's mask) only among the rows it keeps."""
    return [
        [(h.score, first_row + h.row) for h in hits]
        for hits in shard.search_token_lists(token_lists, k, allowed=allowed)
    ]


def local_dense(
    shard: Index,
    first_row: int,
    generation: str,
    queries: Sequence[np.ndarray | None],
    k: int,
    exact: bool = False,
    allowed: np.ndarray | None = None,
) -> list[tuple[np.ndarray, np.ndarray]]:
    """One shard's k nearest articles per query vector as (global rows, cosines), with the
    vector generation `generation` ("" the shard's own vectors)."""
    dense = shard.dense_generation(generation)
    if dense is None:
        raise IndexFormatError(f"{shard.path}: this shard has no word vectors; rebuild the index")
    return [
        (rows + first_row, scores)
        for rows, scores in dense.search(queries, k, exact=exact, allowed=allowed)
    ]


class FanOut(Protocol):
    """Where a `ShardedView` sends each shard's part of a search; every method returns one
    entry per shard, in shard order. `allowed`: each shard's part of a filter's row mask."""

    def search(
        self, token_lists: Sequence[Sequence[str]], k: int, allowed: Sequence[np.ndarray] | None
    ) -> list[list[Scored]]:
        """Per shard, per query, its top k as (score, global row)."""
        ...

    def dense_search(
        self,
        generation: str,
        queries: Sequence[np.ndarray | None],
        k: int,
        exact: bool,
        allowed: Sequence[np.ndarray] | None,
    ) -> DenseLists:
        """Per shard, per query vector, its k nearest as (global rows, cosines)."""
        ...

    def score_rows(self, tokens: Sequence[str], rows: Sequence[np.ndarray]) -> list[np.ndarray]:
        """Per shard, the BM25 scores of some of its rows (local row numbers)."""
        ...


class LocalShards:
    """The fan-out in this process: the shards opened here, asked one after the other."""

    def __init__(self, shards: Sequence[Index], first_rows: Sequence[int]) -> None:
        self.shards, self.first_rows = list(shards), list(first_rows)

    def search(
        self, token_lists: Sequence[Sequence[str]], k: int, allowed: Sequence[np.ndarray] | None
    ) -> list[list[Scored]]:
        """See `FanOut.search`."""
        return [
            local_search(s, first, token_lists, k, None if allowed is None else allowed[i])
            for i, (s, first) in enumerate(zip(self.shards, self.first_rows, strict=True))
        ]

    def dense_search(
        self,
        generation: str,
        queries: Sequence[np.ndarray | None],
        k: int,
        exact: bool,
        allowed: Sequence[np.ndarray] | None,
    ) -> DenseLists:
        """See `FanOut.dense_search`."""
        return [
            local_dense(
                s, first, generation, queries, k, exact, None if allowed is None else allowed[i]
            )
            for i, (s, first) in enumerate(zip(self.shards, self.first_rows, strict=True))
        ]

    def score_rows(self, tokens: Sequence[str], rows: Sequence[np.ndarray]) -> list[np.ndarray]:
        """See `FanOut.score_rows`."""
        return [s.bm25_of_rows(tokens, r) for s, r in zip(self.shards, rows, strict=True)]
