"""Fusing BM25's and the word vectors' candidate lists."""

from __future__ import annotations

import numpy as np
import pytest

from retriever import Index, build_index
from retriever.hybrid import fuse

from .foldoc import clue_from, foldoc_words, synthetic_articles


def test_minmax_fusion_by_hand() -> None:
    # BM25: rows 3, 1, 2 with 9, 5, 1 -> scaled 1, 0.5, 0; vectors: rows 2, 7 with 0.8, 0.6
    # -> 1, 0. Fused with w = 0.25: row 3: 0.25, row 1: 0.125, row 2: 0 + 0.75, row 7: 0.
    rows, scores = fuse(
        np.array([3, 1, 2]),
        np.array([9.0, 5.0, 1.0]),
        np.array([2, 7]),
        np.array([0.8, 0.6]),
        weight=0.25,
    )
    assert rows.tolist() == [2, 3, 1, 7]
    assert np.allclose(scores, [0.75, 0.25, 0.125, 0.0])


def test_rrf_fusion_by_hand() -> None:
    rows, scores = fuse(
        np.array([3, 1]),
        np.array([9.0, 5.0]),
        np.array([1, 4]),
        np.array([0.9, 0.1]),
        fusion="rrf",
        rrf_k=60,
    )
    # row 1: 1/62 + 1/61; row 3: 1/61; row 4: 1/62.
    assert rows.tolist() == [1, 3, 4]
    assert np.allclose(scores, [1 / 62 + 1 / 61, 1 / 61, 1 / 62])


def test_fusion_edge_cases() -> None:
    # Equal scores scale to 1; an empty list adds nothing; ties go by row.
    rows, scores = fuse(
        np.array([5, 2]), np.array([3.0, 3.0]), np.array([], dtype=np.int64), np.array([])
    )
    assert rows.tolist() == [2, 5] and np.allclose(scores, [0.5, 0.5])
    with pytest.raises(ValueError, match="fusion"):
        fuse(np.array([1]), np.array([1.0]), np.array([1]), np.array([1.0]), fusion="mean")
    with pytest.raises(ValueError, match="weight"):
        fuse(np.array([1]), np.array([1.0]), np.array([1]), np.array([1.0]), weight=1.5)


@pytest.fixture(scope="module")
def setup(tmp_path_factory: pytest.TempPathFactory) -> tuple[Index, list[str]]:
    import random

    words = foldoc_words()[:80_000]
    records = list(synthetic_articles(400, seed=8, words=words))
    idx = build_index(
        records, tmp_path_factory.mktemp("h") / "idx", vectors={"dim": 24, "epochs": 3}
    )
    rng = random.Random(2)
    clues = [clue_from(records[i]["text"], rng, words) for i in range(0, 400, 20)]
    return idx, clues


def test_hits_carry_both_scores_and_ranks(setup: tuple[Index, list[str]]) -> None:
    idx, clues = setup
    pool = 30
    for clue in clues[:8]:
        res = idx.search_hybrid(clue, 40, pool=pool)
        assert res.mode == "hybrid" and res.note is None
        bm25 = idx.search(clue, pool)
        tokens = idx.analyzer.tokens(clue)
        qv = idx.dense.vectors.query_vector(*idx.term_ids(tokens))  # type: ignore[union-attr]
        ((d_rows, d_cos),) = idx.dense.search([qv], pool)  # type: ignore[union-attr]
        b_rank = {h.row: h.rank for h in bm25}
        d_rank = {r: i + 1 for i, r in enumerate(d_rows.tolist())}
        full = idx.score_tokens(tokens)
        docvec = np.asarray(idx.dense.vectors.docvec)  # type: ignore[union-attr]
        union = set(b_rank) | set(d_rank)
        assert res.sizes == {"bm25": len(bm25), "dense": d_rows.size, "union": len(union)}
        assert {h.row for h in res.hits} <= union and len(res.hits) == min(40, len(union))
        for h in res.hits:
            assert h.bm25_rank == b_rank.get(h.row) and h.dense_rank == d_rank.get(h.row)
            assert h.in_both == (h.row in b_rank and h.row in d_rank)
            assert h.bm25 == pytest.approx(full[h.row], rel=1e-6)
            assert h.cosine == pytest.approx(float(docvec[h.row] @ qv), abs=1e-5)
            assert h.doc_id == idx.ids[h.row]
        # Fused score from the definition, and sorted by it.
        b = np.array([x.score for x in bm25])
        lo_b, hi_b = b.min(), b.max()
        lo_d, hi_d = d_cos.min(), d_cos.max()
        for h in res.hits:
            want = 0.0
            if h.bm25_rank:
                want += 0.5 * (bm25[h.bm25_rank - 1].score - lo_b) / (hi_b - lo_b)
            if h.dense_rank:
                want += 0.5 * (d_cos[h.dense_rank - 1] - lo_d) / (hi_d - lo_d)
            assert h.score == pytest.approx(want, abs=1e-9)
        assert [h.rank for h in res.hits] == list(range(1, len(res.hits) + 1))
        assert all(a.score >= b.score for a, b in zip(res.hits, res.hits[1:], strict=False))


def test_weight_one_is_bm25_order(setup: tuple[Index, list[str]]) -> None:
    idx, clues = setup
    for clue in clues[:5]:
        res = idx.search_hybrid(clue, 10, weight=1.0)
        bm25 = idx.search(clue, 10)
        # Same order, except that ties in BM25 score may fall either way.
        assert [h.bm25 for h in res.hits] == pytest.approx([h.score for h in bm25], rel=1e-6)


def test_batch_equals_one_by_one(setup: tuple[Index, list[str]]) -> None:
    idx, clues = setup
    for fusion in ("minmax", "rrf"):
        many = idx.search_hybrid_many([*clues, "", "zzqqxx"], 15, pool=20, fusion=fusion)
        one = [idx.search_hybrid(c, 15, pool=20, fusion=fusion) for c in [*clues, "", "zzqqxx"]]
        assert many == one
    assert many[-1].hits == [] and many[-1].mode == "bm25"


def test_hybrid_finds_articles_bm25_misses(setup: tuple[Index, list[str]]) -> None:
    idx, clues = setup
    res = idx.search_hybrid_many(clues, 50, pool=25)
    only_dense = sum(1 for r in res for h in r.hits if h.bm25_rank is None)
    both = sum(1 for r in res for h in r.hits if h.in_both)
    assert only_dense > 0 and both > 0


def test_bad_arguments(setup: tuple[Index, list[str]]) -> None:
    idx, clues = setup
    with pytest.raises(ValueError, match="at least 1"):
        idx.search_hybrid(clues[0], 0)
    with pytest.raises(ValueError, match="at least 1"):
        idx.search_hybrid(clues[0], 5, pool=0)
