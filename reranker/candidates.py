"""Which articles a clue's candidate set holds: BM25's top k, or the top k of the hybrid pool.

Serving and training both call `find_candidates`, so a model is always scored on sets made
the way it was trained on. In hybrid mode the set is the top k of BM25's and the word
vectors' pools fused (`retriever.hybrid.fuse`, with the weight training chose); either way
the set is then ordered by BM25 score, best first, with `rank` its BM25 rank within the set,
so every BM25 feature keeps its meaning, and the dense evidence rides along in `DenseInfo`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from retriever import Hit, Index, vecgen
from retriever.dense import DenseSearcher
from retriever.hybrid import FUSIONS, fuse, members_bm25
from retriever.shardview import ShardedView

from .errors import ModelFormatError
from .features import DenseInfo

MODES = ("bm25", "hybrid")


@dataclass(frozen=True)
class CandidatePolicy:
    """How candidate sets are made (stored in the model file as its "candidates" section)."""

    mode: str = "bm25"  # "bm25": BM25's top k; "hybrid": top k of the fused pools
    weight: float = 0.5  # BM25's share of the fused score (1.0: BM25's order over the pools)
    pool: int = 100  # articles taken from each of BM25 and the vectors before fusing
    fusion: str = "minmax"  # or "rrf" (reciprocal rank fusion)
    # The vector generation of the index the dense side uses (retriever/vecgen.py): vectors
    # refined on the labelled clues at training; "" for the index's own vectors.
    vectors: str = ""

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON data."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Any, *, source: str = "<model>") -> CandidatePolicy:
        """Read the model file's section, checking every field (absent: BM25, as before)."""
        if data is None:
            return cls()
        where = f"{source}: candidates"
        if not isinstance(data, dict):
            raise ModelFormatError(f"{where} must be an object; retrain the model")
        mode, weight = data.get("mode"), data.get("weight")
        pool, fusion = data.get("pool"), data.get("fusion")
        if mode not in MODES:
            raise ModelFormatError(f"{where}.mode must be one of {MODES}, got {mode!r}")
        if (
            not isinstance(weight, int | float)
            or isinstance(weight, bool)
            or not math.isfinite(weight)
            or not 0 <= weight <= 1
        ):
            raise ModelFormatError(f"{where}.weight must be a number in [0, 1], got {weight!r}")
        if not isinstance(pool, int) or isinstance(pool, bool) or pool < 1:
            raise ModelFormatError(f"{where}.pool must be a positive integer, got {pool!r}")
        if fusion not in FUSIONS:
            raise ModelFormatError(f"{where}.fusion must be one of {FUSIONS}, got {fusion!r}")
        vectors = data.get("vectors", "")
        if not isinstance(vectors, str) or (vectors and not vecgen.valid_name(vectors)):
            raise ModelFormatError(
                f"{where}.vectors must be a vector generation name (16 hex digits) or empty, "
                f"got {vectors!r}"
            )
        return cls(mode, float(weight), pool, fusion, vectors)


def dense_of(index: Index, policy: CandidatePolicy) -> DenseSearcher | None:
    """The dense searcher a policy uses: the index's own vectors, or its refined generation
    (IndexFormatError naming the folder when the index lacks it)."""
    return index.dense_generation(policy.vectors)


@dataclass(frozen=True)
class Pools:
    """One clue's two ranked pools, before fusing: rows and scores, best first."""

    bm25_rows: np.ndarray
    bm25_scores: np.ndarray
    dense_rows: np.ndarray
    dense_scores: np.ndarray
    query: np.ndarray | None  # the clue's vector (None: no word of it has one)
    # The dense pool's BM25 scores, when the search gave them (a sharded index's shards do,
    # so they need not be asked again); None: members missing from BM25's pool are scored.
    dense_bm25: np.ndarray | None = None

    def known_bm25(self) -> tuple[np.ndarray, np.ndarray]:
        """(rows, BM25 scores) known without scoring again; BM25's own pool wins a tie."""
        if self.dense_bm25 is None:
            return self.bm25_rows, self.bm25_scores
        rows = np.concatenate([self.dense_rows, self.bm25_rows])
        return rows, np.concatenate([self.dense_bm25, self.bm25_scores])


def search_pools(
    index: Index,
    token_lists: Sequence[Sequence[str]],
    pool: int,
    allowed: np.ndarray | None = None,
    policy: CandidatePolicy | None = None,
) -> list[Pools]:
    """BM25's and the vectors' top `pool` of each clue (the vectors' empty without them),
    with the vectors `policy` names (default: the index's own); with `allowed` (a metadata
    filter's row mask), both searched among those rows only."""
    dense = dense_of(index, policy or CandidatePolicy())
    if dense is not None and isinstance(index, ShardedView):
        # One call to each shard for both lists, the nearest rows' BM25 scores with them.
        vecs = [dense.vectors.query_vector(*index.term_ids(t)) for t in token_lists]
        both = index.search_pools(token_lists, pool, dense, vecs, allowed)
        return [
            Pools(*_rows_scores(hits), rows, cos, vec, bm25)
            for (hits, rows, cos, bm25), vec in zip(both, vecs, strict=True)
        ]
    bm25 = index.search_token_lists(token_lists, pool, allowed=allowed)
    empty = (np.empty(0, dtype=np.int64), np.empty(0))
    if dense is None:
        queries: list[np.ndarray | None] = [None] * len(token_lists)
        dense_lists = [empty] * len(token_lists)
    else:
        queries = [dense.vectors.query_vector(*index.term_ids(t)) for t in token_lists]
        dense_lists = dense.search(queries, pool, allowed=allowed)
    out = []
    for hits, query, (d_rows, d_scores) in zip(bm25, queries, dense_lists, strict=True):
        out.append(Pools(*_rows_scores(hits), d_rows, d_scores, query))
    return out


def _rows_scores(hits: Sequence[Hit]) -> tuple[np.ndarray, np.ndarray]:
    rows = np.fromiter((h.row for h in hits), np.int64, len(hits))
    return rows, np.fromiter((h.score for h in hits), np.float64, len(hits))


def fused_rows(p: Pools, k: int, policy: CandidatePolicy) -> np.ndarray:
    """The top k rows of the fused pools, best first."""
    rows, _ = fuse(
        p.bm25_rows,
        p.bm25_scores,
        p.dense_rows,
        p.dense_scores,
        weight=policy.weight,
        fusion=policy.fusion,
    )
    return rows[:k]


def _hybrid_set(
    index: Index,
    tokens: Sequence[str],
    p: Pools,
    k: int,
    policy: CandidatePolicy,
    dense: DenseSearcher | None,
) -> tuple[list[Hit], DenseInfo]:
    rows = fused_rows(p, k, policy)
    bm25 = members_bm25(index, tokens, rows, *p.known_bm25())
    cos = dense.cosines(p.query, rows) if dense is not None else np.zeros(rows.size)
    d_rank = {r: i + 1 for i, r in enumerate(p.dense_rows.tolist())}
    b_member = set(p.bm25_rows.tolist())
    # Order the set by BM25 score (ties: fused order), so "rank" is the BM25 rank in the set.
    order = np.lexsort((np.arange(rows.size), -bm25))
    rows, bm25, cos = rows[order], bm25[order], cos[order]
    fused_rank = (order + 1).astype(np.int64)
    dense_rank = np.array([d_rank.get(r, 0) for r in rows.tolist()], dtype=np.int64)
    in_both = np.array([r in b_member and r in d_rank for r in rows.tolist()], dtype=bool)
    ids, titles = index.ids.take(rows), index.titles.take(rows)
    hits = [
        Hit(ids[i], titles[i], float(bm25[i]), i + 1, int(r)) for i, r in enumerate(rows.tolist())
    ]
    return hits, DenseInfo(cos, dense_rank, fused_rank, in_both)


def find_candidates(
    index: Index,
    token_lists: Sequence[Sequence[str]],
    k: int,
    policy: CandidatePolicy,
    allowed: np.ndarray | None = None,
) -> list[tuple[list[Hit], DenseInfo | None]]:
    """Each clue's candidate set (BM25 order, best first) and, in hybrid mode, its dense side.

    `allowed` (bool, one per article): candidates come only from the rows it keeps, chosen
    inside the searches before their top-k cuts, so a set may hold fewer than k.
    """
    if policy.mode == "bm25" or index.dense is None:
        return [(hits, None) for hits in index.search_token_lists(token_lists, k, allowed=allowed)]
    dense = dense_of(index, policy)
    pools = search_pools(index, token_lists, max(policy.pool, k), allowed, policy)
    return [
        _hybrid_set(index, tokens, p, k, policy, dense)
        for tokens, p in zip(token_lists, pools, strict=True)
    ]
