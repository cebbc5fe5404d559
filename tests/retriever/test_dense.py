"""Dense search: the exact blocked product, the HNSW graph's recall, and their use by an index."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

from retriever import ann, build_index, dense
from retriever.vectors import VectorSettings

from .foldoc import foldoc_words, synthetic_articles


def _clustered(n: int, dim: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Unit vectors around random centres (as topic-like article vectors are), and queries."""
    rng = np.random.default_rng(seed)
    centres = rng.standard_normal((n // 20, dim))
    x = centres[rng.integers(0, len(centres), n)] + 0.35 * rng.standard_normal((n, dim))
    q = centres[rng.integers(0, len(centres), 200)] + 0.35 * rng.standard_normal((200, dim))
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    q /= np.linalg.norm(q, axis=1, keepdims=True)
    return x.astype(np.float32), q.astype(np.float32)


@pytest.mark.parametrize("block", [7, 1000, 65_536])
def test_exact_top_k_equals_a_full_sort(monkeypatch: pytest.MonkeyPatch, block: int) -> None:
    x, q = _clustered(600, 12, seed=1)
    x[5] = 0.0  # an article without a vector is never a candidate
    x[9] = x[8]  # a tie: the lower row first
    q[0] = x[8]
    monkeypatch.setattr(dense, "_BLOCK", block)
    got = dense.exact_top_k(x, q, 25)
    sims = q.astype(np.float32) @ x.T
    for j, (rows, scores) in enumerate(got):
        order = np.lexsort((np.arange(x.shape[0]), -sims[j]))
        order = order[order != 5][:25]
        assert rows.tolist() == order.tolist()
        assert np.allclose(scores, sims[j][order], atol=1e-6)
    assert got[0][0][:2].tolist() == [8, 9]


def test_exact_top_k_with_k_above_the_rows() -> None:
    x, q = _clustered(40, 8, seed=2)
    rows, _ = dense.exact_top_k(x, q[:1], 100)[0]
    assert sorted(rows.tolist()) == list(range(40))


def test_hnsw_recall_against_exact(tmp_path: Path) -> None:
    # Recall@100 of the approximate search against the exact one, on 20k synthetic
    # clustered 64-d vectors; 0.98 is the bar set for it.
    x, q = _clustered(20_000, 64, seed=3)
    settings = VectorSettings(dim=64)
    info = ann.build(tmp_path, x, settings)
    assert (tmp_path / ann.ANN_FILE).exists() and info["library"] == "faiss"
    graph = ann.AnnIndex(tmp_path, x.shape[0], settings.ann_ef_search)
    approx = graph.search(q, 100)
    exact = dense.exact_top_k(x, q, 100)
    recall = np.mean(
        [
            len(set(a.tolist()) & set(e.tolist())) / 100
            for a, (e, _) in zip(approx, exact, strict=True)
        ]
    )
    assert recall >= 0.98, recall


def test_damaged_graph_is_reported(tmp_path: Path) -> None:
    (tmp_path / ann.ANN_FILE).write_bytes(b"not a graph")
    with pytest.raises(Exception, match="corrupt"):
        ann.AnnIndex(tmp_path, 10, 16)


@pytest.fixture(scope="module")
def records() -> list[dict[str, Any]]:
    return list(synthetic_articles(300, seed=4, words=foldoc_words()[:60_000]))


def test_index_uses_the_graph_above_the_threshold(
    tmp_path: Path, records: list[dict[str, Any]]
) -> None:
    opts = {"dim": 16, "epochs": 2, "seed": 3, "threads": 1}
    big = build_index(records, tmp_path / "g", vectors={**opts, "ann_min_articles": 100})
    small = build_index(records, tmp_path / "e", vectors=opts)
    assert big.manifest["vectors"]["ann"]["library"] == "faiss"
    assert big.dense is not None and big.dense.approximate
    assert small.dense is not None and not small.dense.approximate
    assert (tmp_path / "g" / ann.ANN_FILE).exists()
    assert not (tmp_path / "e" / ann.ANN_FILE).exists()
    # Same vectors; the graph's list, rescored exactly, matches the exact list on 300 rows.
    assert np.array_equal(big.dense.vectors.docvec, small.dense.vectors.docvec)
    clues = [r["text"][:200] for r in records[:10]]
    for clue in clues:
        tids, qtf = big.term_ids(big.analyzer.tokens(clue))
        qv = big.dense.vectors.query_vector(tids, qtf)
        ((ra, sa),) = big.dense.search([qv], 10)
        ((re_, se),) = big.dense.search([qv], 10, exact=True)
        assert len(set(ra.tolist()) & set(re_.tolist())) >= 9
        assert np.all(np.diff(sa) <= 0)
        # Cosines of the graph's hits are exact ones.
        exact_of = dict(zip(re_.tolist(), se.tolist(), strict=True))
        for row, score in zip(ra.tolist(), sa.tolist(), strict=True):
            if row in exact_of:
                assert score == pytest.approx(exact_of[row], abs=1e-6)


def test_query_without_known_words_has_no_vector(
    tmp_path: Path, records: list[dict[str, Any]]
) -> None:
    idx = build_index(records[:50], tmp_path / "q", vectors={"dim": 8, "epochs": 1})
    tids, qtf = idx.term_ids(idx.analyzer.tokens("zzqqxx wwvvyy"))
    assert idx.dense is not None and idx.dense.vectors.query_vector(tids, qtf) is None
    r = idx.search_hybrid("zzqqxx wwvvyy", 5)
    assert r.mode == "bm25" and r.hits == [] and "none of the clue's words" in (r.note or "")
