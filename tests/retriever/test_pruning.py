"""The kernel's pruned top-k against exhaustive scoring: the same rows and scores, bit for bit,
and evidence that pruning skipped postings."""

from __future__ import annotations

import json
import random
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from retriever import Index, bounds, build_index, load_index, scoring, update_index

from .foldoc import clue_from, foldoc_words, synthetic_articles
from .helpers import docs_to_records, plain_index, write_jsonl

needs_kernel = pytest.mark.skipif(not scoring.compiled(), reason="retriever._kernels is not built")

COMMON = [f"c{i}" for i in range(4)]
RARE = [f"r{i}" for i in range(30)]


def run(idx: Index, queries: list[list[str]], k: int, prune: bool | None) -> tuple[list, list]:
    """Each query's (rows, scores) and the postings it read."""
    plan = idx._plan(queries)
    buf = idx._buffer()
    work = np.zeros(len(queries), dtype=np.int64)
    out = scoring.top_k_many(buf, plan, k, prune=prune, work=work)
    assert not buf.any(), "the kernel must leave the buffer zeroed"
    return [(r.tolist(), s.tolist()) for r, s in out], work.tolist()


def synthetic_index(
    folder: Path, n: int, seed: int, *, clue_seed: int, every: int
) -> tuple[Index, list[str]]:
    """An index of `n` synthetic articles over FOLDOC's words (the benchmark's corpus shape),
    and a clue from every `every`-th article."""
    words = foldoc_words()[:80_000]
    records = list(synthetic_articles(n, seed=seed, words=words))
    idx = build_index(records, folder)
    rng = random.Random(clue_seed)
    return idx, [clue_from(records[i]["text"], rng, words) for i in range(0, n, every)]


def same_everywhere(idx: Index, queries: list[list[str]], k: int) -> list[tuple[int, int]]:
    """Pruned, exhaustive and numpy results must be identical; returns (pruned, all) work."""
    pruned, w_pruned = run(idx, queries, k, True)
    full, w_full = run(idx, queries, k, False)
    plan = idx._plan(queries)
    numpy_path = scoring.top_k_many(idx._buffer(), plan, k, use_kernel=False)
    assert pruned == full
    assert full == [(r.tolist(), s.tolist()) for r, s in numpy_path]
    return list(zip(w_pruned, w_full, strict=True))


def tied_docs(seed: int, n: int) -> list[list[str]]:
    """Articles of a few common and a few rare words, many of them exact copies (ties)."""
    rng = random.Random(seed)
    docs: list[list[str]] = []
    while len(docs) < n:
        if docs and rng.random() < 0.4:
            docs.append(list(rng.choice(docs)))  # an exact copy: the same scores
            continue
        words = rng.choices(COMMON, k=rng.randint(3, 12))
        words += rng.choices(RARE, k=rng.randint(0, 3))
        docs.append(words)
    return docs


@needs_kernel
@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    n=st.integers(50, 600),
    queries=st.lists(
        st.lists(st.sampled_from(COMMON + RARE), min_size=1, max_size=16), min_size=1, max_size=8
    ),
    k=st.integers(1, 30),
    title_weight=st.sampled_from([0.0, 2.0]),
)
def test_pruned_top_k_equals_exhaustive_with_many_ties(
    tmp_path_factory: pytest.TempPathFactory,
    seed: int,
    n: int,
    queries: list[list[str]],
    k: int,
    title_weight: float,
) -> None:
    # Copies of articles tie exactly; ties must go to the lower row in every path.
    idx = plain_index(tmp_path_factory.mktemp("p"), tied_docs(seed, n), title_weight=title_weight)
    same_everywhere(idx, queries, k)


@needs_kernel
def test_pruning_skips_postings_and_keeps_the_result(tmp_path: Path) -> None:
    # Rare words decide the top k; the common words' postings mostly cannot change it, so
    # the kernel must read fewer postings than the query holds (a silent fallback to
    # scoring everything would read them all).
    idx = plain_index(tmp_path, tied_docs(3, 3000), title_weight=0.0)
    assert idx.body.bounds is not None
    queries = [[r, *COMMON[:3]] for r in RARE[:10]] + [[RARE[1], RARE[2], COMMON[0]]]
    work = same_everywhere(idx, queries, 5)
    skipped = [w for w in work if w[0] < w[1] // 2]
    assert len(skipped) >= len(queries) // 2, work


@needs_kernel
def test_benchmark_queries_pruned_equal_exhaustive(tmp_path: Path) -> None:
    # The benchmark's corpus and clue shape (tests/benchmarks/bench_retrieval.py), smaller.
    idx, clues = synthetic_index(tmp_path / "idx", 3000, 11, clue_seed=4, every=60)
    token_lists = [idx.analyzer.tokens(c) for c in clues]
    for k in (1, 10, 50):
        same_everywhere(idx, token_lists, k)
    # Hybrid pools take the BM25 list: the same with and without pruning.
    idx.prune = True
    pruned = [h.row for hits in idx.search_many(clues, 20) for h in hits]
    idx.prune = False
    assert pruned == [h.row for hits in idx.search_many(clues, 20) for h in hits]


def test_bounds_written_and_kept_by_updates(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, tied_docs(1, 300), title_weight=2.0)

    def check(index: Index) -> None:
        for fld in (index.body, index.title_field):
            want = bounds.compute(fld.indptr, fld.weight)
            assert fld.bounds is not None
            assert fld.bounds.term_max.tolist() == want.term_max.tolist()
            assert fld.bounds.block_max.tolist() == want.block_max.tolist()
            # By definition: no stored weight exceeds its term's or block's maximum.
            term_of = np.repeat(np.arange(fld.indptr.size - 1), np.diff(fld.indptr))
            assert (fld.weight <= fld.bounds.term_max[term_of]).all()
            block_of = np.arange(fld.weight.size) // bounds.BLOCK
            assert (fld.weight <= fld.bounds.block_max[block_of]).all()

    check(idx)
    extra = docs_to_records([["r1", "r2", "c0"], ["r3"] * 5], prefix="new")
    updated = update_index(idx.path, add=write_jsonl(tmp_path / "add.jsonl", extra))
    check(updated)
    check(update_index(idx.path, remove=["d3", "d10", "new1"]))


@needs_kernel
def test_folder_without_bounds_opens_and_searches_exhaustively(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, tied_docs(2, 800), title_weight=0.0)
    queries = [[r, *COMMON[:3]] for r in RARE[:6]]
    before, _ = run(idx, queries, 5, True)
    del idx
    for prefix in ("body", "title"):
        for what in ("term_max", "block_max"):
            (tmp_path / "idx" / f"{prefix}_{what}.npy").unlink()
    old = load_index(tmp_path / "idx")
    assert old.body.bounds is None
    after, work = run(old, queries, 5, True)
    _, full = run(old, queries, 5, False)
    assert after == before and work == full  # nothing skipped, same hits


@needs_kernel
def test_kernel_rejects_bounds_that_do_not_match(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, tied_docs(2, 200), title_weight=0.0)
    plan = idx._plan([[RARE[0], COMMON[0]]])
    fld = idx.body
    assert fld.bounds is not None
    short = fld.bounds.block_max[:-1].copy()
    rows, scores, counts = np.empty(5, np.int64), np.empty(5), np.empty(1, np.int64)
    with pytest.raises(ValueError, match="block_max"):
        scoring._kernels.search(
            idx._buffer(), idx._scratch(), 5,
            ((fld.indptr, fld.docs, fld.weight, 1.0, fld.bounds.term_max, short),),
            plan.qptr, plan.tids, plan.qtf, rows, scores, counts, True, None,
        )  # fmt: skip


def test_search_many_and_threads_give_the_same_hits(tmp_path: Path) -> None:
    idx, clues = synthetic_index(tmp_path / "idx", 600, 5, clue_seed=6, every=3)
    one = idx.search_many(clues, 10, threads=1)
    two = idx.search_many(clues, 10, threads=2)
    assert json.dumps([[h.row for h in hs] for hs in one]) == json.dumps(
        [[h.row for h in hs] for hs in two]
    )
    assert [[h.score for h in hs] for hs in one] == [[h.score for h in hs] for hs in two]
    with pytest.raises(ValueError, match="threads"):
        idx.search_many(clues, 10, threads=0)
