"""Hybrid candidates: BM25's and the word vectors' top lists fused into one list.

Each clue is searched both ways (`pool` articles from each); the union is ranked by
  fused = w * minmax(bm25) + (1 - w) * minmax(cosine)
with each list's scores min-max scaled over that list's own pool for that clue (an article
missing from a list gets 0 from it), or by reciprocal rank fusion, sum of 1 / (rrf_k + rank)
over the lists it is in (Cormack, Clarke and Buettcher 2009, "Reciprocal rank fusion
outperforms Condorcet and individual rank learning methods"; rrf_k = 60 as there).
Every hit also carries its BM25 score and cosine whether or not it made each pool.
An index without vectors, or a clue none of whose words has a vector, gets BM25's list
alone with a note saying so.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol, cast

import numpy as np

from .analyzer import Analyzer
from .hits import Hit
from .storedvectors import DenseVectors

FUSIONS = ("minmax", "rrf")


class _Column(Protocol):
    def take(self, rows: np.ndarray) -> list[str]: ...


class _Dense(Protocol):
    """Dense search (`DenseSearcher`, or the sharded index's merged one)."""

    @property
    def vectors(self) -> DenseVectors: ...

    def search(
        self, queries: Sequence[np.ndarray | None], k: int, *, exact: bool = False
    ) -> list[tuple[np.ndarray, np.ndarray]]: ...

    def cosines(self, query: np.ndarray | None, rows: np.ndarray) -> np.ndarray: ...


class HybridSource(Protocol):
    """What hybrid search needs of an index (`retriever.index.Index` has all of it).

    A protocol rather than the Index class itself, so this module does not import the
    module that imports it.
    """

    analyzer: Analyzer

    @property
    def ids(self) -> _Column: ...

    @property
    def titles(self) -> _Column: ...

    @property
    def dense(self) -> _Dense | None: ...

    def search_token_lists(
        self, token_lists: Sequence[Sequence[str]], k: int = 20
    ) -> list[list[Hit]]: ...

    def term_ids(self, tokens: Sequence[str]) -> tuple[np.ndarray, np.ndarray]: ...

    def score_rows(self, tokens: Sequence[str], rows: np.ndarray) -> dict[int, float]: ...


@dataclass(frozen=True)
class HybridHit:
    """One fused candidate. Ranks are 1-based; None where the article was not in that pool."""

    doc_id: str
    title: str
    score: float  # the fused score
    rank: int
    row: int
    bm25: float  # BM25 score (0 when it holds no clue word)
    cosine: float  # cosine of clue and article vectors (0 when either has none)
    bm25_rank: int | None
    dense_rank: int | None

    @property
    def in_both(self) -> bool:
        """True when the article was in both pools."""
        return self.bm25_rank is not None and self.dense_rank is not None


@dataclass(frozen=True)
class HybridResult:
    """The fused list of one clue; `mode` is 'hybrid' or 'bm25' (with `note` saying why)."""

    hits: list[HybridHit]
    mode: str
    note: str | None = None
    sizes: dict[str, int] = field(default_factory=dict)


def _minmax(scores: np.ndarray) -> np.ndarray:
    """Scores scaled to 0..1 over the list; all 1 when they are all equal."""
    if scores.size == 0:
        return scores
    lo, hi = float(scores.min()), float(scores.max())
    if hi <= lo:
        return np.ones_like(scores)
    return (scores - lo) / (hi - lo)


def fuse(
    bm25_rows: np.ndarray,
    bm25_scores: np.ndarray,
    dense_rows: np.ndarray,
    dense_scores: np.ndarray,
    *,
    weight: float = 0.5,
    fusion: str = "minmax",
    rrf_k: float = 60.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Fused (rows, scores) of the union of two ranked lists, best first, ties by row."""
    if fusion not in FUSIONS:
        raise ValueError(f"fusion must be one of {FUSIONS}, got {fusion!r}")
    if not 0.0 <= weight <= 1.0:
        raise ValueError(f"weight must be between 0 and 1, got {weight}")
    union = np.union1d(bm25_rows, dense_rows).astype(np.int64)
    fused = np.zeros(union.size)
    for rows, scores, w in (
        (bm25_rows, bm25_scores, weight),
        (dense_rows, dense_scores, 1 - weight),
    ):
        if rows.size == 0:
            continue
        at = np.searchsorted(union, rows)
        if fusion == "minmax":
            fused[at] += w * _minmax(np.asarray(scores, dtype=np.float64))
        else:
            fused[at] += 1.0 / (rrf_k + np.arange(1, rows.size + 1))
    order = np.lexsort((union, -fused))
    return union[order], fused[order]


def members_bm25(
    index: HybridSource,
    tokens: Sequence[str],
    rows: np.ndarray,
    pool_rows: np.ndarray,
    pool_scores: np.ndarray,
) -> np.ndarray:
    """Every member's BM25 score: the BM25 pool's own, and for the rows only the vectors
    found, scored for just those rows."""
    known = dict(zip(pool_rows.tolist(), pool_scores.tolist(), strict=True))
    missing = [r for r in rows.tolist() if r not in known]
    if missing:
        known.update(index.score_rows(tokens, np.asarray(missing, dtype=np.int64)))
    return np.array([known[r] for r in rows.tolist()], dtype=np.float64)


def search_hybrid_many(
    index: HybridSource,
    clues: Sequence[str],
    k: int = 20,
    *,
    pool: int = 100,
    weight: float = 0.5,
    fusion: str = "minmax",
    rrf_k: float = 60.0,
    exact: bool = False,
) -> list[HybridResult]:
    """Fused candidates for each clue (see the module docstring); k <= 2 x pool is useful."""
    if k < 1 or pool < 1:
        raise ValueError(f"k and pool must be at least 1, got k={k}, pool={pool}")
    token_lists = index.analyzer.tokens_many(clues)
    bm25_lists = index.search_token_lists(token_lists, pool)
    dense = index.dense
    if dense is None:
        note = "this index has no word vectors (built with --no-vectors or before them); BM25 only"
        qvecs: list[np.ndarray | None] = [None] * len(clues)
        dense_lists = [(np.empty(0, dtype=np.int64), np.empty(0))] * len(clues)
    else:
        note = "none of the clue's words has a vector; BM25 only"
        qvecs = [dense.vectors.query_vector(*index.term_ids(t)) for t in token_lists]
        dense_lists = dense.search(qvecs, pool, exact=exact)
    out = []
    for tokens, hits, qvec, (d_rows, d_scores) in zip(
        token_lists, bm25_lists, qvecs, dense_lists, strict=True
    ):
        b_rows = np.fromiter((h.row for h in hits), np.int64, len(hits))
        b_scores = np.fromiter((h.score for h in hits), np.float64, len(hits))
        rows, fused = fuse(
            b_rows, b_scores, d_rows, d_scores, weight=weight, fusion=fusion, rrf_k=rrf_k
        )
        rows, fused = rows[:k], fused[:k]
        b_rank = {int(r): i + 1 for i, r in enumerate(b_rows.tolist())}
        d_rank = {int(r): i + 1 for i, r in enumerate(d_rows.tolist())}
        bm25_all = members_bm25(index, tokens, rows, b_rows, b_scores)
        cos = dense.cosines(qvec, rows) if dense is not None else np.zeros(rows.size)
        ids, titles = index.ids.take(rows), index.titles.take(rows)
        out.append(
            HybridResult(
                [
                    HybridHit(
                        ids[i],
                        titles[i],
                        float(fused[i]),
                        i + 1,
                        int(r),
                        float(bm25_all[i]),
                        float(cos[i]),
                        b_rank.get(int(r)),
                        d_rank.get(int(r)),
                    )
                    for i, r in enumerate(rows.tolist())
                ],
                "bm25" if qvec is None else "hybrid",
                None if qvec is not None else note,
                {
                    "bm25": len(hits),
                    "dense": int(d_rows.size),
                    "union": int(np.union1d(b_rows, d_rows).size),
                },
            )
        )
    return out


def search_hybrid(index: HybridSource, clue: str, k: int = 20, **options: object) -> HybridResult:
    """`search_hybrid_many` for one clue."""
    return search_hybrid_many(index, [clue], k, **options)[0]  # type: ignore[arg-type]


class HybridSearch:
    """`search_hybrid` and `search_hybrid_many` for an index class that is a HybridSource
    (the one index and the sharded one take them from here)."""

    def search_hybrid(self, clue: str, k: int = 20, **options: Any) -> HybridResult:
        """BM25 and word-vector candidates fused into one list (see retriever/hybrid.py)."""
        return search_hybrid_many(cast(HybridSource, self), [clue], k, **options)[0]

    def search_hybrid_many(
        self, clues: Sequence[str], k: int = 20, **options: Any
    ) -> list[HybridResult]:
        """`search_hybrid` for each clue, in order."""
        return search_hybrid_many(cast(HybridSource, self), clues, k, **options)
