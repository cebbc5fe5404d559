"""Dense search: the articles whose vectors are nearest a clue's vector (cosine), exact or
approximate.

Exact search multiplies the memory-mapped article vectors by the query vectors block by
block and keeps each query's k best with argpartition, so memory stays bounded whatever
the corpus size. Indexes with an HNSW graph (see retriever/ann.py) take its candidates and
score them exactly, so a cosine means the same in both modes.
"""

from __future__ import annotations

import threading
from collections.abc import Sequence
from contextlib import AbstractContextManager, nullcontext
from typing import TYPE_CHECKING

import numpy as np
from threadpoolctl import ThreadpoolController

from .storedvectors import DenseVectors

if TYPE_CHECKING:
    from .ann import AnnIndex

# Query vectors (None: a clue none of whose words has a vector); a boolean row mask or
# None; one query's nearest articles as (rows, cosines), best first.
Queries = Sequence[np.ndarray | None]
Mask = np.ndarray | None
Nearest = tuple[np.ndarray, np.ndarray]

_BLOCK = 65_536  # article rows per block of the exact product (~50 MB of float32 at 200-d)
# Candidates kept beyond k from the blocked product before exact rescoring: BLAS may add a
# batch's products in another order than one query's, so the final cosines are recomputed
# one way for all (see `dot`), and a batch gives the same lists as its clues one by one.
_MARGIN = 16
# A few queries make the product a matrix-vector one, bound by memory: BLAS threads add only
# their start-up and, on a busy machine, spin-waits (measured 34 ms against 0.6 ms for one
# query over 5,000 x 200 on a loaded 2-core machine). Fewer queries than this run on one
# BLAS thread; bigger batches keep BLAS's own threading.
_ONE_THREAD_BELOW = 32
_blas: ThreadpoolController | None = None


def _blas_threads(n_queries: int) -> AbstractContextManager[object]:
    """One BLAS thread for small query batches (threadpoolctl), else no change."""
    global _blas
    if n_queries >= _ONE_THREAD_BELOW:
        return nullcontext()
    if _blas is None:
        _blas = ThreadpoolController()  # scanning the loaded libraries once is the costly part
    return _blas.limit(limits=1, user_api="blas")


def dot(vectors: np.ndarray, query: np.ndarray) -> np.ndarray:
    """Dot products of some article vectors with one query, in float64 and in an order that
    does not depend on how many rows or queries there are (numpy's pairwise sum per row)."""
    return (np.asarray(vectors, dtype=np.float64) * query.astype(np.float64)).sum(axis=1)


def exact_top_k(
    docvec: np.ndarray, queries: np.ndarray, k: int, rows: np.ndarray | None = None
) -> list[tuple[np.ndarray, np.ndarray]]:
    """Each query's k highest dot products with the rows of `docvec`: (rows int64, scores
    float64), best first, ties by row. Rows whose vector is all zero are left out.

    `rows` (ascending int64): search only these rows (a metadata filter's), block by block
    as over the whole matrix, so memory stays bounded however many rows pass.
    """
    want = k
    k = k + _MARGIN
    n_docs = docvec.shape[0] if rows is None else rows.size
    nq = queries.shape[0]
    q = np.ascontiguousarray(queries, dtype=np.float32).T  # dim x nq
    best_rows = [np.empty(0, dtype=np.int64) for _ in range(nq)]
    best_scores = [np.empty(0, dtype=np.float32) for _ in range(nq)]
    for s in range(0, n_docs, _BLOCK):
        picked = None if rows is None else rows[s : s + _BLOCK]
        block = np.asarray(
            docvec[s : s + _BLOCK] if picked is None else docvec[picked], dtype=np.float32
        )
        live = np.any(block != 0, axis=1)
        with _blas_threads(nq):
            sims = block @ q  # rows x nq
        sims[~live] = -np.inf
        kk = min(k, sims.shape[0])
        part = np.argpartition(-sims, kk - 1, axis=0)[:kk] if kk < sims.shape[0] else None
        for j in range(nq):
            cand = part[:, j] if part is not None else np.arange(sims.shape[0])
            sc = sims[cand, j]
            keep = np.isfinite(sc)
            found = cand[keep].astype(np.int64)
            found = found + s if picked is None else picked[found]
            got = np.concatenate([best_rows[j], found])
            scores = np.concatenate([best_scores[j], sc[keep]])
            order = np.lexsort((got, -scores))[:k]
            best_rows[j], best_scores[j] = got[order], scores[order]
    out = []
    for j, got in enumerate(best_rows):
        scores = dot(docvec[got], queries[j])
        order = np.lexsort((got, -scores))[:want]
        out.append((got[order], scores[order]))
    return out


class DenseSearcher:
    """Nearest articles by cosine for query vectors, over one index's vectors."""

    def __init__(self, vectors: DenseVectors) -> None:
        self.vectors = vectors
        self._ann: AnnIndex | None = None
        self._lock = threading.Lock()

    @property
    def approximate(self) -> bool:
        """True when an HNSW graph is used."""
        return self.vectors.ann_info is not None

    def _ann_index(self) -> AnnIndex:
        with self._lock:
            if self._ann is None:
                from .ann import AnnIndex

                v = self.vectors
                self._ann = AnnIndex(v.folder, v.docvec.shape[0], v.settings.ann_ef_search)
            return self._ann

    def search(
        self,
        queries: Sequence[np.ndarray | None],
        k: int,
        *,
        exact: bool = False,
        allowed: np.ndarray | None = None,
    ) -> list[tuple[np.ndarray, np.ndarray]]:
        """(rows, cosines) of each query's k nearest articles, best first; empty for None.

        `allowed` (bool, one per article): only the rows it keeps. A filtered search is
        always exact over those rows, not the graph's: the graph's candidates are the
        nearest in the whole corpus, and a selective filter could leave none of them, so
        the result equals an exhaustive search over the allowed articles.
        """
        if k < 1:
            raise ValueError(f"k must be at least 1, got {k}")
        return self._nearest(queries, k, exact, allowed)

    def _nearest(self, queries: Queries, k: int, exact: bool, allowed: Mask) -> list[Nearest]:
        """`search` once its arguments are checked (a sharded searcher asks its shards)."""
        empty = (np.empty(0, dtype=np.int64), np.empty(0))
        out: list[tuple[np.ndarray, np.ndarray]] = [empty] * len(queries)
        live = [i for i, q in enumerate(queries) if q is not None]
        if not live:
            return out
        mat = np.stack([queries[i] for i in live]).astype(np.float32)  # type: ignore[misc]
        if allowed is not None:
            rows = np.flatnonzero(allowed).astype(np.int64)
            results = exact_top_k(self.vectors.docvec, mat, k, rows)
        elif exact or not self.approximate:
            results = exact_top_k(self.vectors.docvec, mat, k)
        else:
            results = self._rescore(self._ann_index().search(mat, k), mat, k)
        for i, res in zip(live, results, strict=True):
            out[i] = res
        return out

    def _rescore(
        self, cand: np.ndarray, mat: np.ndarray, k: int
    ) -> list[tuple[np.ndarray, np.ndarray]]:
        """Exact cosines of the graph's candidates, sorted best first (ties by row)."""
        results = []
        for j in range(cand.shape[0]):
            rows = np.unique(cand[j][cand[j] >= 0])
            vec = np.asarray(self.vectors.docvec[rows], dtype=np.float32)
            live = np.any(vec != 0, axis=1)
            rows, sc = rows[live], dot(vec[live], mat[j])
            order = np.lexsort((rows, -sc))[:k]
            results.append((rows[order], sc[order]))
        return results

    def cosines(self, query: np.ndarray | None, rows: np.ndarray) -> np.ndarray:
        """Cosine of a query vector with some articles (0 where either has no vector)."""
        if query is None or rows.size == 0:
            return np.zeros(rows.size)
        return dot(self.vectors.docvec[rows], query)
