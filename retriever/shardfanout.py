"""How a sharded index's searches reach its shards: the `FanOut` a `ShardedView` asks.

Each method gives one entry per shard, in shard order, rows counted over the whole corpus:
BM25's top k for analysed terms, the nearest articles for query vectors made by the caller,
the BM25 scores of a few rows, and (`pools`, for hybrid candidates) BM25's top k and the
nearest articles together, with the BM25 scores of those nearest articles, in one call per
shard. `ShardWork` is what one shard does for each call; `ShardCalls` holds each call's
shape once and leaves only how the shards are reached to its subclasses: `LocalShards` asks
the shards opened in this process one after the other, api/rayserve.py's `RemoteShards`
sends every call to all shard deployments (whose replicas are `ShardWork`s) before waiting.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Sequence
from typing import Any

import numpy as np

from .errors import IndexFormatError
from .index import Index
from .shardeddense import DenseLists, shard_parts, shifted

# Per query, best first: (score, global row).
Scored = list[tuple[float, int]]
# Per query, one shard's nearest articles: (global rows, cosines, BM25 scores of those rows).
NearestBM25 = list[tuple[np.ndarray, np.ndarray, np.ndarray]]
# A shard's part of a filter's row mask: the booleans, packed to bits as (bits, rows) for a
# trip to another process (1 bit an article, not 8), or None (no filter).
Wired = np.ndarray | tuple[np.ndarray, int] | None


def pack(mask: np.ndarray | None) -> Wired:
    """A boolean mask packed to bits for the trip to a shard."""
    return None if mask is None else (np.packbits(mask), int(mask.shape[0]))


def unpack(mask: Wired) -> np.ndarray | None:
    """The boolean mask `pack` sent (a mask not packed is returned as it is)."""
    if mask is None or isinstance(mask, np.ndarray):
        return mask
    bits, n = mask
    return np.unpackbits(bits, count=n).astype(bool)


class ShardWork:
    """One shard's part of each search: its folder, searched with rows counted from
    `first_row`; `allowed` is the shard's part of a filter's mask (packed or not)."""

    def __init__(self, index: Index, first_row: int) -> None:
        self.index, self.first_row = index, first_row

    def search(self, token_lists: Sequence[Sequence[str]], k: int, allowed: Wired) -> list[Scored]:
        """Per query, this shard's top k as (score, global row), best first."""
        return [
            [(h.score, self.first_row + h.row) for h in hits]
            for hits in self.index.search_token_lists(token_lists, k, allowed=unpack(allowed))
        ]

    def dense_search(
        self,
        generation: str,
        queries: Sequence[np.ndarray | None],
        k: int,
        exact: bool,
        allowed: Wired,
    ) -> list[tuple[np.ndarray, np.ndarray]]:
        """Per query vector, this shard's k nearest as (global rows, cosines), best first,
        with the vector generation `generation` ("" the shard's own vectors)."""
        dense = self.index.dense_generation(generation)
        if dense is None:
            raise IndexFormatError(
                f"{self.index.path}: this shard has no word vectors; rebuild the index"
            )
        return shifted(dense, self.first_row, queries, k, exact, unpack(allowed))

    def score_rows(self, tokens: Sequence[str], rows: np.ndarray) -> np.ndarray:
        """BM25 scores of some of this shard's rows (local numbers)."""
        return self.index.bm25_of_rows(tokens, rows)

    def pools(
        self,
        token_lists: Sequence[Sequence[str]],
        k: int,
        generation: str,
        queries: Sequence[np.ndarray | None],
        k_dense: int,
        allowed: Wired,
    ) -> tuple[list[Scored], NearestBM25]:
        """`search` and `dense_search` in one call, each nearest article with its BM25
        score for the query's terms (so the caller need not ask for it again)."""
        mask = unpack(allowed)
        nearest = self.dense_search(generation, queries, k_dense, False, mask)
        return self.search(token_lists, k, mask), [
            (rows, cos, self.score_rows(tokens, rows - self.first_row))
            for tokens, (rows, cos) in zip(token_lists, nearest, strict=True)
        ]


class ShardCalls(ABC):
    """Where a `ShardedView` sends each shard's part of a search: every call is one
    `ShardWork` method asked of each shard, and returns one entry per shard, in shard order
    (`allowed`: each shard's part of a filter's row mask). A subclass says how the shards
    are reached (`each`) and how a mask travels (`wire`)."""

    n_shards: int

    @abstractmethod
    def each(self, method: str, args: Sequence[tuple[Any, ...] | None]) -> list[Any]:
        """`ShardWork.<method>(*args[i])` on every shard i (None: shard i is not asked, and
        its entry is None), results in shard order."""

    def wire(self, mask: np.ndarray) -> Wired:
        """A shard's part of a filter's mask as sent to it."""
        return mask

    def _masks(self, allowed: Sequence[np.ndarray] | None) -> list[Wired]:
        return [
            self.wire(a) if a is not None else None for a in shard_parts(allowed, self.n_shards)
        ]

    def search(
        self, token_lists: Sequence[Sequence[str]], k: int, allowed: Sequence[np.ndarray] | None
    ) -> list[list[Scored]]:
        """Per shard, per query, its top k as (score, global row)."""
        lists = [list(t) for t in token_lists]
        return self.each("search", [(lists, k, a) for a in self._masks(allowed)])

    def dense_search(
        self,
        generation: str,
        queries: Sequence[np.ndarray | None],
        k: int,
        exact: bool,
        allowed: Sequence[np.ndarray] | None,
    ) -> DenseLists:
        """Per shard, per query vector, its k nearest as (global rows, cosines)."""
        qs = list(queries)
        return self.each(
            "dense_search", [(generation, qs, k, exact, a) for a in self._masks(allowed)]
        )

    def score_rows(self, tokens: Sequence[str], rows: Sequence[np.ndarray]) -> list[np.ndarray]:
        """Per shard, the BM25 scores of some of its rows (local row numbers; shards with
        none are not asked)."""
        terms = list(tokens)
        got = self.each("score_rows", [(terms, r) if r.size else None for r in rows])
        return [np.empty(0) if g is None else g for g in got]

    def pools(
        self,
        token_lists: Sequence[Sequence[str]],
        k: int,
        generation: str,
        queries: Sequence[np.ndarray | None],
        k_dense: int,
        allowed: Sequence[np.ndarray] | None,
    ) -> list[tuple[list[Scored], NearestBM25]]:
        """Per shard, `ShardWork.pools`: both top lists in one call."""
        lists, qs = [list(t) for t in token_lists], list(queries)
        return self.each(
            "pools", [(lists, k, generation, qs, k_dense, a) for a in self._masks(allowed)]
        )


class LocalShards(ShardCalls):
    """The fan-out in this process: the shards opened here, asked one after the other."""

    def __init__(self, shards: Sequence[Index], first_rows: Sequence[int]) -> None:
        self.work = [ShardWork(s, f) for s, f in zip(shards, first_rows, strict=True)]
        self.n_shards = len(self.work)

    def each(self, method: str, args: Sequence[tuple[Any, ...] | None]) -> list[Any]:
        """See `ShardCalls.each`."""
        return [
            None if a is None else getattr(w, method)(*a)
            for w, a in zip(self.work, args, strict=True)
        ]


# What a `ShardedView` is given to reach its shards.
FanOut = ShardCalls
