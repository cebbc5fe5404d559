"""The kernel's windowed top-k (retriever/_daat.h) against its exhaustive one, called directly
on random postings big enough to span many windows of rows: the same rows and scores, bit
for bit, ties included, in float32 and float64, with empty queries and k above the matches."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from retriever import bounds, scoring

needs_kernel = pytest.mark.skipif(not scoring.compiled(), reason="retriever._kernels is not built")


def random_field(rng: np.random.Generator, n_docs: int, n_terms: int, dtype: type) -> tuple:
    """Term-major postings (rows ascending in each term) with a few coarse weight levels,
    so many articles tie exactly; some terms are in most articles, some in a handful."""
    indptr, docs, weight = [0], [], []
    for _ in range(n_terms):
        density = float(rng.choice([0.0, 0.0005, 0.01, 0.2, 0.9]))
        rows = np.flatnonzero(rng.random(n_docs) < density).astype(np.int32)
        docs.append(rows)
        weight.append((rng.integers(0, 6, rows.size) * 0.375).astype(dtype))  # zeros too
        indptr.append(indptr[-1] + rows.size)
    ip = np.array(indptr, dtype=np.int64)
    w = np.concatenate(weight).astype(dtype)
    b = bounds.compute(ip, w)
    return ip, np.concatenate(docs).astype(np.int32), w, b.term_max, b.block_max


def search(
    n_docs: int,
    fields: list[tuple],
    scales: list[float],
    queries,
    k: int,
    prune: bool,
    allowed: np.ndarray | None = None,
):
    from retriever import _kernels  # type: ignore[attr-defined]

    dtype = fields[0][2].dtype
    plan = scoring.plan([], queries)
    n = plan.n_queries
    buf = np.zeros(n_docs, dtype=dtype)
    rows, scores = np.empty(n * k, np.int64), np.empty(n * k, np.float64)
    counts, work = np.empty(n, np.int64), np.zeros(n, np.int64)
    specs = tuple(
        (ip, d, w, s, tm, bm) for (ip, d, w, tm, bm), s in zip(fields, scales, strict=True)
    )
    touched = np.empty(n_docs, np.int32)
    _kernels.search(
        buf,
        touched,
        k,
        specs,
        plan.qptr,
        plan.tids,
        plan.qtf,
        rows,
        scores,
        counts,
        prune,
        work,
        allowed,
    )
    assert not buf.any(), "the kernel must leave the buffer zeroed"
    out = [
        (rows[q * k : q * k + c].tolist(), scores[q * k : q * k + c].tolist())
        for q, c in enumerate(counts.tolist())
    ]
    return out, int(work.sum())


@needs_kernel
@settings(max_examples=60, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_docs=st.sampled_from([1, 700, 9000, 30_000]),
    dtype=st.sampled_from([np.float32, np.float64]),
    two_fields=st.booleans(),
    k=st.sampled_from([1, 3, 10, 50, 5000]),
)
def test_windowed_equals_exhaustive(
    seed: int, n_docs: int, dtype: type, two_fields: bool, k: int
) -> None:
    rng = np.random.default_rng(seed)
    n_terms = 14
    fields = [random_field(rng, n_docs, n_terms, dtype) for _ in range(2 if two_fields else 1)]
    scales = [1.0, 2.5][: len(fields)]
    queries = [
        [int(t) for t in rng.integers(0, n_terms, rng.integers(0, 20))] for _ in range(6)
    ] + [[]]  # an empty query too
    windowed, _ = search(n_docs, fields, scales, queries, k, True)
    exhaustive, _ = search(n_docs, fields, scales, queries, k, False)
    assert windowed == exhaustive


@needs_kernel
def test_windowed_skips_postings_when_a_rare_term_decides() -> None:
    # One heavy rare term and three light common ones over 60k articles: once the heap
    # holds the rare term's articles, windows without it cannot beat the k-th score.
    rng = np.random.default_rng(5)
    n_docs = 60_000
    ip, docs, w = [0], [], []
    for density, level in ((0.001, 9.0), (0.9, 0.5), (0.9, 0.5), (0.9, 0.5)):
        rows = np.flatnonzero(rng.random(n_docs) < density).astype(np.int32)
        docs.append(rows)
        w.append(np.full(rows.size, level, np.float32) * rng.uniform(0.5, 1, rows.size))
        ip.append(ip[-1] + rows.size)
    ipa, wa = np.array(ip, np.int64), np.concatenate(w).astype(np.float32)
    b = bounds.compute(ipa, wa)
    field = (ipa, np.concatenate(docs), wa, b.term_max, b.block_max)
    query = [[0, 1, 2, 3]]
    windowed, read = search(n_docs, [field], [1.0], query, 10, True)
    exhaustive, total = search(n_docs, [field], [1.0], query, 10, False)
    assert windowed == exhaustive
    assert read < total / 2  # most windows skipped


@needs_kernel
@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_docs=st.sampled_from([50, 9000, 30_000]),
    keep=st.sampled_from([0.0, 0.01, 0.5, 1.0]),
    k=st.sampled_from([1, 10, 400]),
)
def test_windowed_with_a_row_mask_ranks_only_the_kept_rows(
    seed: int, n_docs: int, keep: float, k: int
) -> None:
    # Reference: every scored row from the exhaustive kernel (k = all rows), best first,
    # ties by row; the kept ones among them, cut to k.
    rng = np.random.default_rng(seed)
    fields = [random_field(rng, n_docs, 14, np.float32)]
    allowed = rng.random(n_docs) < keep
    queries = [[int(t) for t in rng.integers(0, 14, rng.integers(0, 20))] for _ in range(5)]
    masked, _ = search(n_docs, fields, [1.0], queries, k, True, allowed)
    everything, _ = search(n_docs, fields, [1.0], queries, n_docs, False)
    expected = []
    for rows, scores in everything:
        kept = [(r, s) for r, s in zip(rows, scores, strict=True) if allowed[r]][:k]
        expected.append(([r for r, _ in kept], [s for _, s in kept]))
    assert masked == expected
