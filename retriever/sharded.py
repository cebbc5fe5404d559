"""A sharded index's folder: its top manifest, and searching all its shards as one index.

The folder holds ordinary index folders (`shard-000`, ...) of contiguous rows of one corpus,
built with the whole corpus's statistics (retriever/shards.py), so an article's score is the
one a single index gives it. A search asks every shard for its k best and merges them by
(score descending, row ascending), rows counted over the whole corpus: exactly how a single
index orders its hits and breaks its ties.
"""

from __future__ import annotations

import heapq
import json
from collections.abc import Callable, Sequence
from functools import cached_property
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from . import hybrid, store
from .analyzer import Analyzer
from .errors import IndexFormatError
from .hits import Hit
from .shardeddense import ShardedColumn, ShardedDense

SHARDS_FORMAT_VERSION = 1


class Shard(Protocol):
    """What searching needs from one shard (an `Index`)."""

    n_docs: int
    manifest: dict[str, Any]
    analyzer: Analyzer

    def search_token_lists(
        self, token_lists: Sequence[Sequence[str]], k: int = 20
    ) -> list[list[Hit]]: ...


def write_manifest(folder: Path, manifest: dict[str, Any]) -> None:
    """Write the top manifest (atomically, last: its presence marks a whole sharded index)."""
    store.write_json(
        folder / store.MANIFEST,
        {"format": store.SHARDS_FORMAT, "format_version": SHARDS_FORMAT_VERSION, **manifest},
    )


def read_manifest(folder: Path) -> dict[str, Any]:
    """The top manifest of a sharded index's folder, checked."""

    path = folder / store.MANIFEST
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise IndexFormatError(f"{path}: unreadable ({exc}); rebuild the index") from exc
    if not isinstance(data, dict) or data.get("format") != store.SHARDS_FORMAT:
        raise IndexFormatError(f"{folder}: not a sharded hunchwise index")
    if data.get("format_version") != SHARDS_FORMAT_VERSION:
        raise IndexFormatError(
            f"{folder}: sharded index format version {data.get('format_version')} is not "
            f"supported (this hunchwise reads {SHARDS_FORMAT_VERSION}); rebuild the index"
        )
    if not isinstance(data.get("shards"), list) or not data["shards"]:
        raise IndexFormatError(f"{path}: field 'shards' must be a non-empty list; rebuild")
    return data


def merge_scored(lists: Sequence[Sequence[tuple[float, int]]], k: int) -> list[tuple[float, int]]:
    """The k best of several shards' (score, global row) lists for one query, ordered by
    (score descending, row ascending): how a single index orders its hits and breaks ties."""
    pool = (pair for pairs in lists for pair in pairs)
    return heapq.nsmallest(k, pool, key=lambda p: (-p[0], p[1]))


class ShardedIndex(hybrid.HybridSearch):
    """The shards of one corpus searched as one index: BM25, dense and hybrid search."""

    def __init__(self, folder: Path, open_shard: Callable[[Path], Shard]) -> None:
        self.path = folder
        self.manifest = read_manifest(folder)
        self.shards: list[Shard] = []
        self.first_rows: list[int] = []
        expected = 0
        stats_sha = self.manifest.get("stats", {}).get("sha256")
        for i, entry in enumerate(self.manifest["shards"]):
            try:
                sub = folder / str(entry["folder"])
                first, n = int(entry["first_row"]), int(entry["articles"])
            except (KeyError, TypeError, ValueError) as exc:
                raise IndexFormatError(
                    f"{folder / store.MANIFEST}: shard {i} lacks field {exc}; rebuild"
                ) from exc
            shard = open_shard(sub)
            info = shard.manifest.get("shard", {})
            if first != expected or shard.n_docs != n or info.get("first_row") != first:
                raise IndexFormatError(
                    f"{sub}: holds rows {info.get('first_row')}.. ({shard.n_docs} articles), "
                    f"the top manifest says {first}.. ({n}); rebuild the index"
                )
            if info.get("stats_sha256") != stats_sha:
                raise IndexFormatError(
                    f"{sub}: built with other corpus statistics than its siblings (its "
                    f"statistics checksum {str(info.get('stats_sha256'))[:12]}, the top "
                    f"manifest's {str(stats_sha)[:12]}); rebuild the index"
                )
            self.shards.append(shard)
            self.first_rows.append(first)
            expected += n
        self.n_docs = expected
        self.analyzer = self.shards[0].analyzer

    @property
    def version(self) -> str:
        """Short identifier of this index's content and parameters."""
        return str(self.manifest["index_version"])

    def __len__(self) -> int:
        return self.n_docs

    def search_token_lists(
        self, token_lists: Sequence[Sequence[str]], k: int = 20
    ) -> list[list[Hit]]:
        """Top-k of every shard merged by (score desc, global row asc), per token list."""
        if k < 1:
            raise ValueError(f"k must be at least 1, got {k}")
        per_shard = [s.search_token_lists(token_lists, k) for s in self.shards]
        out = []
        for q in range(len(token_lists)):
            by_row = {
                first + h.row: h
                for first, lists in zip(self.first_rows, per_shard, strict=True)
                for h in lists[q]
            }
            best = merge_scored([[(h.score, r) for r, h in by_row.items()]], k)
            out.append(
                [
                    Hit(by_row[row].doc_id, by_row[row].title, score, i + 1, row)
                    for i, (score, row) in enumerate(best)
                ]
            )
        return out

    def search_tokens(self, tokens: Sequence[str], k: int = 20) -> list[Hit]:
        """Top-k articles for already-analyzed tokens, best first (ties by row)."""
        return self.search_token_lists([tokens], k)[0]

    def search(self, clue: str, k: int = 20) -> list[Hit]:
        """Top-k articles for a free-text clue, best first."""
        return self.search_tokens(self.analyzer.tokens(clue), k)

    def search_many(self, clues: Sequence[str], k: int = 20) -> list[list[Hit]]:
        """`search` for each clue, in order."""
        return self.search_token_lists(self.analyzer.tokens_many(clues), k)

    # -- dense and hybrid search (retriever/shardeddense.py) ----------------
    def _dense_shards(self) -> list[Any]:
        return list(self.shards)  # Index objects: dense search needs more than `Shard`

    @cached_property
    def ids(self) -> ShardedColumn:
        """Article ids by global row."""
        return ShardedColumn([s.ids for s in self._dense_shards()], self.first_rows)

    @cached_property
    def titles(self) -> ShardedColumn:
        """Article titles by global row."""
        return ShardedColumn([s.titles for s in self._dense_shards()], self.first_rows)

    @cached_property
    def dense(self) -> ShardedDense | None:
        """Nearest-article search over every shard's vectors, merged; None without them."""
        return ShardedDense.of(self._dense_shards(), self.first_rows)

    def term_ids(self, tokens: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """Known query terms as (term ids, counts); the shards share one vocabulary."""
        ids, qtf = self._dense_shards()[0].term_ids(tokens)
        return ids, qtf

    def score_tokens(self, tokens: Sequence[str]) -> np.ndarray:
        """BM25 score of every article by global row (each shard's, side by side)."""
        return np.concatenate([s.score_tokens(tokens) for s in self._dense_shards()])

    def score_rows(self, tokens: Sequence[str], rows: np.ndarray) -> dict[int, float]:
        """BM25 scores of some articles by global row."""
        scores = self.score_tokens(tokens)
        return {int(r): float(scores[r]) for r in np.asarray(rows).tolist()}

    def __repr__(self) -> str:
        return (
            f"ShardedIndex({str(self.path)!r}, articles={self.n_docs}, shards={len(self.shards)})"
        )
