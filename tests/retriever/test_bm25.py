"""BM25 scores against rank_bm25.BM25Okapi and against worked examples of the published formulas."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from rank_bm25 import BM25Okapi

from retriever import BM25Params
from retriever.bm25 import idf_lucene, idf_okapi

from .helpers import plain_index

# The worked examples' corpus (tokens as the plain analyzer keeps them):
#   d0 = apple banana apple      (length 3)
#   d1 = banana cherry           (length 2)
#   d2 = cherry date elder fig   (length 4)
# N = 3, avgdl = (3 + 2 + 4) / 3 = 3; df: apple 1, banana 2, cherry 2, date/elder/fig 1.
WORKED = [["apple", "banana", "apple"], ["banana", "cherry"], ["cherry", "date", "elder", "fig"]]


def rel_close(ours: np.ndarray, ref: np.ndarray) -> bool:
    """1e-5 relative agreement; 1e-12 absolute only where the reference itself is ~0."""
    return bool(np.allclose(ours, ref, rtol=1e-5, atol=1e-12))


def test_okapi_worked_example(tmp_path: Path) -> None:
    # Robertson and Zaragoza (2009), "The Probabilistic Relevance Framework: BM25 and Beyond":
    #   w = idf * tf * (k1 + 1) / (tf + k1 * (1 - b + b * dl / avgdl)), k1 = 1.5, b = 0.75,
    #   idf = ln((N - df + 0.5) / (df + 0.5)); rank_bm25's floor replaces a negative idf by
    #   epsilon * mean idf (epsilon = 0.25).
    # idf(apple) = ln(2.5 / 1.5) = 0.5108256; idf(banana) = idf(cherry) = ln(1.5 / 2.5) = -0.5108256
    # mean idf over the 6 terms = (4 * 0.5108256 - 2 * 0.5108256) / 6 = 0.1702752
    # floor = 0.25 * 0.1702752 = 0.0425688
    idx = plain_index(tmp_path, WORKED)
    # "apple" in d0: tf 2, dl 3 -> norm = 1.5 * (0.25 + 0.75 * 3/3) = 1.5
    #   0.5108256 * 2 * 2.5 / (2 + 1.5) = 0.7297509
    assert idx.score_tokens(["apple"]) == pytest.approx([0.7297509, 0.0, 0.0], rel=1e-6)
    # "banana" (floored): d0 tf 1, dl 3 -> 0.0425688 * 2.5 / (1 + 1.5) = 0.0425688
    #   d1 tf 1, dl 2 -> norm = 1.5 * (0.25 + 0.75 * 2/3) = 1.125
    #   -> 0.0425688 * 2.5 / 2.125 = 0.0500809
    assert idx.score_tokens(["banana"]) == pytest.approx([0.0425688, 0.0500809, 0.0], rel=1e-5)
    # "apple cherry": d2 has cherry tf 1, dl 4 -> norm = 1.5 * 1.25 = 1.875
    #   0.0425688 * 2.5 / (1 + 1.875) = 0.0370163
    assert idx.score_tokens(["apple", "cherry"]) == pytest.approx(
        [0.7297509, 0.0500809, 0.0370163], rel=1e-5
    )
    hits = idx.search("apple cherry", k=3)
    assert [h.doc_id for h in hits] == ["d0", "d1", "d2"]


def test_lucene_idf_worked_example(tmp_path: Path) -> None:
    # Kamphuis et al. (2020), "Which BM25 Do You Mean? A Large-Scale Reproducibility Study of
    # Scoring Variants": idf = ln(1 + (N - df + 0.5) / (df + 0.5)), never negative, no floor.
    # idf(apple) = ln(1 + 2.5 / 1.5) = ln(2.6667) = 0.9808293
    # idf(banana) = ln(1 + 1.5 / 2.5) = ln(1.6) = 0.4700036
    idx = plain_index(tmp_path, WORKED, idf="lucene")
    # apple in d0: 0.9808293 * 2 * 2.5 / 3.5 = 1.4011846
    assert idx.score_tokens(["apple"]) == pytest.approx([1.4011846, 0.0, 0.0], rel=1e-6)
    # banana: d0 0.4700036 * 2.5 / 2.5 = 0.4700036; d1 0.4700036 * 2.5 / 2.125 = 0.5529454
    assert idx.score_tokens(["banana"]) == pytest.approx([0.4700036, 0.5529454, 0.0], rel=1e-6)


def test_term_in_every_document() -> None:
    # N = 3, df = 3: okapi ln(0.5 / 3.5) = -1.9459101 is negative, so rank_bm25 floors it;
    # lucene ln(1 + 0.5 / 3.5) = 0.1335314 stays positive (Kamphuis et al. 2020).
    df = np.array([3, 1])
    okapi = idf_okapi(df, 3, 0.25)
    mean = (math.log(0.5 / 3.5) + math.log(2.5 / 1.5)) / 2
    assert okapi[0] == pytest.approx(0.25 * mean)
    assert idf_lucene(np.array([3]), 3)[0] == pytest.approx(0.1335314, rel=1e-6)


def test_term_in_exactly_half(tmp_path: Path) -> None:
    # N = 2, df = 1: okapi ln(1.5 / 1.5) = 0 exactly, which is not negative, so no floor: the
    # article scores 0 and is no candidate; lucene ln(1 + 1.5 / 1.5) = ln 2 = 0.6931472.
    docs = [["alpha", "beta"], ["gamma", "delta"]]
    idx = plain_index(tmp_path, docs)
    ref = BM25Okapi(docs)
    assert idx.score_tokens(["alpha"]).tolist() == ref.get_scores(["alpha"]).tolist() == [0, 0]
    assert idx.search("alpha") == []
    luc = plain_index(tmp_path, docs, name="luc", idf="lucene")
    # dl 2 = avgdl, tf 1: 0.6931472 * 2.5 / (1 + 1.5) = 0.6931472
    assert luc.score_tokens(["alpha"]) == pytest.approx([0.6931472, 0.0], rel=1e-6)


@pytest.mark.parametrize(
    "docs",
    [
        [["solo", "word", "word"]],  # N = 1: every idf is ln(0.5 / 1.5) < 0, floor is negative
        [["one", "two"], ["two", "three", "three"]],  # N = 2
    ],
)
def test_tiny_corpora_match_rank_bm25(tmp_path: Path, docs: list[list[str]]) -> None:
    # Reference: rank_bm25.BM25Okapi with its default k1 = 1.5, b = 0.75, epsilon = 0.25.
    idx = plain_index(tmp_path, docs)
    ref = BM25Okapi(docs)
    vocab = sorted({t for d in docs for t in d})
    for query in [[t] for t in vocab] + [vocab, [*vocab, vocab[0]]]:
        assert rel_close(idx.score_tokens(query), ref.get_scores(query))


def test_lucene_single_article(tmp_path: Path) -> None:
    # N = 1, df = 1: ln(1 + 0.5 / 1.5) = 0.2876821; tf 1, dl = avgdl -> weight = idf.
    idx = plain_index(tmp_path, [["lonely"]], idf="lucene")
    assert idx.score_tokens(["lonely"]) == pytest.approx([0.2876821], rel=1e-6)


WORDS = st.sampled_from(["aa", "bb", "cc", "dd", "ee", "ff", "gg", "hh", "ii", "jj", "kk", "ll"])
CORPUS = st.lists(st.lists(WORDS, min_size=0, max_size=12), min_size=1, max_size=14).filter(
    lambda docs: any(docs)
)


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(docs=CORPUS, query=st.lists(WORDS, min_size=1, max_size=8))
def test_random_corpora_match_rank_bm25(
    tmp_path_factory: pytest.TempPathFactory, docs: list[list[str]], query: list[str]
) -> None:
    # Property test against rank_bm25.BM25Okapi: every document's score, for the same tokens.
    idx = plain_index(tmp_path_factory.mktemp("h"), docs)
    ref = BM25Okapi(docs)
    assert rel_close(idx.score_tokens(query), ref.get_scores(query))
    hits = idx.search_tokens(query, k=len(docs))
    expected = ref.get_scores(query)
    for h in hits:
        assert h.score == pytest.approx(expected[h.row], rel=1e-5, abs=1e-12)


FULL_DOCS = st.lists(st.lists(WORDS, min_size=1, max_size=12), min_size=1, max_size=14)


@settings(max_examples=15, deadline=None)
@given(k1=st.floats(0.1, 3.0), b=st.floats(0.0, 1.0), eps=st.floats(0.0, 1.0), docs=FULL_DOCS)
def test_parameters_match_rank_bm25(
    tmp_path_factory: pytest.TempPathFactory, k1: float, b: float, eps: float, docs: list[list[str]]
) -> None:
    # rank_bm25.BM25Okapi(k1=, b=, epsilon=) is the reference for non-default parameters too
    # (k1 = 0, or b = 1 with an empty article, is left out: rank_bm25 then divides 0 by 0).
    idx = plain_index(tmp_path_factory.mktemp("p"), docs, k1=k1, b=b, epsilon=eps)
    ref = BM25Okapi(docs, k1=k1, b=b, epsilon=eps)
    query = sorted({t for d in docs for t in d})
    assert rel_close(idx.score_tokens(query), ref.get_scores(query))


def test_defaults_equal_rank_bm25() -> None:
    # rank_bm25.BM25Okapi.__init__ defaults: k1=1.5, b=0.75, epsilon=0.25.
    ref = BM25Okapi([["x"]])
    p = BM25Params()
    assert (p.k1, p.b, p.epsilon, p.title_weight) == (ref.k1, ref.b, ref.epsilon, 0.0)


@pytest.mark.parametrize("bad", [{"k1": -1}, {"b": 1.5}, {"idf": "other"}, {"title_weight": -1}])
def test_bad_parameters(bad: dict[str, object]) -> None:
    with pytest.raises(ValueError):
        BM25Params(**bad)  # type: ignore[arg-type]


def test_title_weight_changes_ranking_toward_titles(tmp_path: Path) -> None:
    # Two articles mention "harbor" equally often; only one has it in its title.
    records = [
        {"id": "a", "title": "Stone bridge", "text": "harbor boats moor near the stone bridge"},
        {"id": "b", "title": "Harbor", "text": "harbor boats moor near the old quay wall"},
        {"id": "c", "title": "Field", "text": "a green field with sheep"},
    ]
    from retriever import build_index

    plain = build_index(records, tmp_path / "plain", stemmer=None)
    boosted = build_index(records, tmp_path / "boost", stemmer=None, title_weight=2.0)
    # Body only: "a" is shorter, so it wins; the title field lifts "b" above it.
    assert [h.doc_id for h in plain.search("harbor boats")][:2] == ["a", "b"]
    assert [h.doc_id for h in boosted.search("harbor boats")][:2] == ["b", "a"]
    # Default (title_weight 0) keeps exact parity with body-only rank_bm25 scores.
    ref = BM25Okapi([plain.analyzer.tokens(r["text"]) for r in records])
    assert rel_close(plain.score_tokens(["harbor", "bridge"]), ref.get_scores(["harbor", "bridge"]))
    # With a title weight the score is body BM25 + weight x title-field BM25.
    titles = BM25Okapi([plain.analyzer.tokens(r["title"]) for r in records])
    q = ["harbor"]
    assert rel_close(boosted.score_tokens(q), ref.get_scores(q) + 2.0 * titles.get_scores(q))
