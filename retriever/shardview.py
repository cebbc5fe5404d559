"""A sharded index's folder read as one `Index`, searched by a pluggable fan-out.

Ranking a clue needs more of an index than its search: the candidates' ids, titles, names,
lengths, in-links and body terms (reranker/features). `ShardedView` gives all of that by
global row from the shards' own memory-mapped folders, and asks a `FanOut` for each shard's
part of the work: in this process (`LocalShards`), or on other machines (api/rayserve.py,
one Ray Serve deployment per shard). Every shard holds the corpus's whole vocabulary, so
term ids agree across shards and a term's document frequency is the sum of the shards' own.

- BM25: each shard's top k for the analysed terms, merged by `sharded.merge_scored`.
- Word vectors (hybrid models): the shards hold copies of one set of word vectors
  (retriever/shardvectors.py), so the clue's vector is made here once and sent to every
  shard, which returns its nearest articles by global row; `shardeddense.ShardedDense`
  merges them by (cosine desc, row asc), as one index orders them. A refined generation a
  model names (retriever/vecgen.py) is one `vectors-<name>` folder in every shard
  (`hunchwise index copy-vectors` writes them from the index the model was trained on).
- Metadata filters: each shard typed its fields over its own articles, so the view types
  them again over all of them (`metacolumns.concat`) and compiles a filter to one mask,
  which each shard receives its part of.

What the view copies into memory: the per-row arrays (lengths, in-links, popularity: 16
bytes an article) and the article-major term lists the compiled features read by global
row (4 bytes per distinct term of each article, about the size of one body postings file).
"""

from __future__ import annotations

import functools
import threading
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any, cast

import numpy as np

from . import metacolumns, metafilter, store, vecgen
from .columns import JsonListColumn, StringColumn
from .dense import DenseSearcher
from .errors import IndexFormatError
from .hits import Hit, RowMask, TokenLists
from .index import Document, Index, _FieldPostings, load_index
from .metacolumns import MetaColumns
from .sharded import ShardedIndex, merge_scored
from .shardeddense import ShardedDense, merge_nearest
from .shardfanout import FanOut, LocalShards, Scored


class ConcatStrings(StringColumn):
    """Several shards' string columns read as one, by global row."""

    def __init__(self, parts: Sequence[StringColumn], starts: np.ndarray) -> None:
        # The parent's memory maps are the parts' own; nothing of its own to open.
        self._parts = list(parts)
        self._starts = starts  # first row of each part, then the total
        self._len = int(starts[-1])

    def _locate(self, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        part = np.searchsorted(self._starts, rows, side="right") - 1
        return part, rows - self._starts[part]

    def _at(self, row: int) -> str:
        part = int(np.searchsorted(self._starts, row, side="right")) - 1
        return self._parts[part][row - int(self._starts[part])]

    def __iter__(self) -> Iterator[str]:
        for part in self._parts:
            yield from part

    def take(self, rows: np.ndarray) -> list[str]:
        """The strings of several global rows, each shard's asked once."""
        rows = np.asarray(rows, dtype=np.int64)
        if rows.size and (int(rows.min()) < 0 or int(rows.max()) >= self._len):
            raise IndexError(f"rows out of range for {self._len} strings")
        out = [""] * rows.size
        part, local = self._locate(rows)
        for p in np.unique(part).tolist():
            at = np.flatnonzero(part == p)
            for i, text in zip(at.tolist(), self._parts[p].take(local[at]), strict=True):
                out[i] = text
        return out

    def find(self, value: str) -> int | None:
        """Global row holding `value` (each shard's sorted order searched in turn)."""
        for start, part in zip(self._starts.tolist(), self._parts, strict=False):
            row = part.find(value)
            if row is not None:
                return int(start) + row
        return None


def _summed_postings(fields: Sequence[_FieldPostings]) -> _FieldPostings:
    """A field whose `indptr` gives each term's corpus-wide document frequency (the sum
    of the shards'), for the features that read it; its postings are left to the shards."""
    merged = _FieldPostings.__new__(_FieldPostings)
    merged.indptr = functools.reduce(np.add, (f.indptr for f in fields))
    merged.docs = np.empty(0, dtype=np.int32)
    merged.weight = np.empty(0, dtype=fields[0].weight.dtype)
    return merged


class _Generation:
    """One shard's searcher of a generation, as `ShardedDense.of` reads a shard."""

    def __init__(self, dense: DenseSearcher | None) -> None:
        self.dense = dense


class ShardedView(Index):
    """A sharded index as one read-only `Index`: rows from the shards' folders, searches
    from `fan_out` (default: the shards opened here, one after the other)."""

    def __init__(
        self,
        folder: str | Path,
        fan_out: FanOut | None = None,
        *,
        title_weight: float | None = None,
    ) -> None:
        # ShardedIndex checks the top manifest, each shard's rows and statistics checksum.
        sharded = ShardedIndex(Path(folder), functools.partial(Index, title_weight=title_weight))
        shards = [cast(Index, s) for s in sharded.shards]
        self.shards = shards
        self.first_rows = list(sharded.first_rows)
        first = shards[0]
        for s in shards[1:]:
            if s.n_terms != first.n_terms:
                raise IndexFormatError(
                    f"{s.path}: {s.n_terms} terms, {first.path} has {first.n_terms}; the "
                    "shards of one index share the corpus's vocabulary, rebuild the index"
                )
        self.path = Path(folder)
        self.manifest = sharded.manifest
        self.n_docs = sharded.n_docs
        self.n_terms = first.n_terms
        self.analyzer, self.params, self.vocab = first.analyzer, first.params, first.vocab
        self.title_weight = first.title_weight
        starts = np.array([*self.first_rows, self.n_docs], dtype=np.int64)
        self._starts = starts

        def column(name: str) -> ConcatStrings:
            return ConcatStrings([getattr(s, name) for s in shards], starts)

        self.ids, self.titles = column("ids"), column("titles")
        self.bases, self.qualifiers = column("bases"), column("qualifiers")
        self.aliases = JsonListColumn(ConcatStrings([s.aliases._strings for s in shards], starts))
        self.body = _summed_postings([s.body for s in shards])
        self.title_field = _summed_postings([s.title_field for s in shards])
        self.doc_len = np.concatenate([s.doc_len for s in shards])
        self.inlinks = np.concatenate([s.inlinks for s in shards])
        self.popularity = np.concatenate([s.popularity for s in shards])
        lists = [s.article_term_lists() for s in shards]
        ends = np.cumsum([int(ip[-1]) for ip, _ in lists])
        offsets = np.concatenate([[0], ends[:-1]]).astype(np.int64)
        self._fwd_indptr = np.concatenate(
            [np.zeros(1, np.int64)]
            + [ip[1:] + off for (ip, _), off in zip(lists, offsets, strict=True)]
        )
        self._fwd_terms = np.concatenate([t for _, t in lists])
        self.fan_out: FanOut = (
            fan_out if fan_out is not None else LocalShards(shards, self.first_rows)
        )
        self.searches_in_process = fan_out is None
        self._generations: dict[str, DenseSearcher] = {}
        self._generations_lock = threading.Lock()
        self.__dict__["dense"] = self._sharded_dense("")

    def _sharded_dense(self, generation: str) -> ShardedDense | None:
        """The shards' vectors (generation "" their own), searched through the fan-out."""
        if generation:
            for shard in self.shards:
                if generation not in vecgen.names(shard.path):
                    raise IndexFormatError(
                        f"{shard.path}: has no vector generation {generation} (the word "
                        "vectors the model was trained with, refined on its labelled clues); "
                        "copy them into every shard from the index the model was trained on: "
                        f"hunchwise index copy-vectors TRAINED_INDEX {self.path} "
                        f"--generation {generation}"
                    )
            shards = [_Generation(s.dense_generation(generation)) for s in self.shards]
        else:
            shards = [_Generation(s.dense) for s in self.shards]
        return ShardedDense.of(
            shards,
            self.first_rows,
            functools.partial(self.fan_out.dense_search, generation),
            generation,
        )

    def dense_generation(self, name: str) -> DenseSearcher | None:
        """Vector generation `name` of every shard, searched as one (see `Index`); refused,
        saying how to copy it in, when a shard lacks it."""
        if not name or self.dense is None:
            return self.dense
        with self._generations_lock:
            if name not in self._generations:
                dense = self._sharded_dense(name)
                if dense is None:  # not reached: every shard has vectors when self.dense does
                    raise IndexFormatError(f"{self.path}: the shards have no word vectors")
                self._generations[name] = dense
            return self._generations[name]

    @functools.cached_property
    def meta_columns(self) -> MetaColumns:
        """The shards' metadata columns typed again over the whole corpus (`metacolumns.concat`)."""
        return metacolumns.concat([s.meta_columns for s in self.shards])

    def _local_row(self, row: int) -> tuple[Index, int]:
        if not 0 <= row < self.n_docs:
            raise IndexError(f"row {row} out of range for {self.n_docs} articles")
        part = int(np.searchsorted(self._starts, row, side="right")) - 1
        return self.shards[part], row - self.first_rows[part]

    def document_at(self, row: int) -> Document:
        """Stored fields of the article in global `row`."""
        shard, local = self._local_row(row)
        return replace(shard.document_at(local), row=row)

    def score_tokens(self, tokens: Sequence[str]) -> np.ndarray:
        """BM25 score of every article, shard after shard (each weighted with the corpus's
        statistics, so these are a single index's scores)."""
        return np.concatenate([s.score_tokens(tokens) for s in self.shards])

    def score_rows(self, tokens: Sequence[str], rows: np.ndarray) -> dict[int, float]:
        """BM25 scores of some articles by global row, each shard scoring its own."""
        rows = np.asarray(rows, dtype=np.int64)
        part = np.searchsorted(self._starts, rows, side="right") - 1
        picked = [rows[part == p] for p in range(len(self.shards))]
        local = [r - first for r, first in zip(picked, self.first_rows, strict=True)]
        scores = self.fan_out.score_rows(tokens, local)
        return {
            int(r): float(v)
            for rs, vs in zip(picked, scores, strict=True)
            for r, v in zip(rs.tolist(), np.asarray(vs).tolist(), strict=True)
        }

    def filter_mask(self, spec: Mapping[str, Any]) -> np.ndarray:
        """Boolean mask of the rows a metadata filter keeps, over the whole corpus: the
        filter means what it means on the unsharded index (see `metacolumns.concat`)."""
        return metafilter.compile_filter(spec, self.meta_columns)

    def text_of(self, row: int) -> str:
        """The stored text of the article in global `row`."""
        shard, local = self._local_row(row)
        return shard.text_of(local)

    def _parts(self, allowed: RowMask) -> list[np.ndarray] | None:
        """Each shard's part of a row mask over the whole corpus (None: no filter)."""
        if allowed is None:
            return None
        if allowed.shape != (self.n_docs,):
            raise ValueError(f"allowed must hold one entry per article ({self.n_docs})")
        return [allowed[a:b] for a, b in zip(self._starts[:-1], self._starts[1:], strict=True)]

    def _hits(self, per_shard: Sequence[Sequence[Scored]], k: int) -> list[list[Hit]]:
        """Per query, the shards' top lists merged by (score desc, global row asc)."""
        n = len(per_shard[0]) if per_shard else 0
        best = [merge_scored([lists[q] for lists in per_shard], k) for q in range(n)]
        rows = np.array([r for b in best for _, r in b], dtype=np.int64)
        ids, titles = self.ids.take(rows), self.titles.take(rows)
        out: list[list[Hit]] = []
        at = 0
        for b in best:
            out.append(
                [
                    Hit(ids[at + i], titles[at + i], score, i + 1, row)
                    for i, (score, row) in enumerate(b)
                ]
            )
            at += len(b)
        return out

    def search_token_lists(
        self, token_lists: TokenLists, k: int = 20, *, allowed: RowMask = None
    ) -> list[list[Hit]]:
        """Every shard's top k merged by (score desc, global row asc), per token list."""
        parts = self._parts(allowed)
        if k < 1:
            raise ValueError(f"k must be at least 1, got {k}")
        return self._hits(self.fan_out.search(token_lists, k, parts) if token_lists else [], k)

    def search_pools(
        self,
        token_lists: TokenLists,
        k: int,
        dense: DenseSearcher,
        queries: Sequence[np.ndarray | None],
        allowed: RowMask = None,
    ) -> list[tuple[list[Hit], np.ndarray, np.ndarray, np.ndarray]]:
        """Per token list, BM25's top k and the k nearest articles to its query vector
        (`dense`: this view's `dense_generation`) as (hits, rows, cosines, the rows' BM25
        scores), from one call to each shard instead of one round per list; equal to
        `search_token_lists`, `dense.search` and `score_rows` asked one after the other."""
        if k < 1:
            raise ValueError(f"k must be at least 1, got {k}")
        if not isinstance(dense, ShardedDense):
            raise ValueError("search_pools needs this view's own dense searcher")
        per_shard = self.fan_out.pools(
            token_lists, k, dense.generation, queries, k, self._parts(allowed)
        )
        hits = self._hits([bm25 for bm25, _ in per_shard], k)
        near = merge_nearest([nearest for _, nearest in per_shard], k)
        return [(h, *n) for h, n in zip(hits, near, strict=True)]

    def __repr__(self) -> str:
        return f"ShardedView({str(self.path)!r}, articles={self.n_docs}, shards={len(self.shards)})"


def open_whole(folder: str | Path, *, title_weight: float | None = None) -> Index:
    """An index folder for ranking, feature tables and training: a sharded folder
    (`index build --shards`) as one `ShardedView` asking its shards in this process, any
    other folder as `load_index` opens it. The same hits, features and scores either way."""
    if store.is_sharded(Path(folder)):
        return ShardedView(folder, title_weight=title_weight)
    return load_index(folder, title_weight=title_weight)
