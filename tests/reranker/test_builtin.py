"""Built-in features on the five-article corpus of conftest, with every value worked out by hand.

The corpus is indexed without stemming or stopwords, so a token is a lower-cased word. The
clue is "Which grey river town near Pellomir has stone": 8 words and 8 distinct tokens, of which
grey, river, town, pellomir and stone occur in the corpus. Body document frequencies (N = 5):
grey 2 (a1, a3), river 2 (a2, a4), town 2 (a2, a3), pellomir 1 (a3), stone 3 (a1, a2, a5).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import scipy.special
import scipy.stats
from rank_bm25 import BM25Okapi

from reranker import CandidateSet, default_registry
from reranker.features import DenseInfo, candidate_set
from reranker.features import builtin as B
from retriever import Index

CLUE = "Which grey river town near Pellomir has stone"
IDS = ["a1", "a2", "a3", "a4", "a5"]
SCORES = np.array([5.0, 4.0, 2.0, 1.5, 1.0])
LOG = math.log


@pytest.fixture
def cs(tiny_index: Index) -> CandidateSet:
    """The five articles as candidates of CLUE, with hand-chosen BM25 scores 5, 4, 2, 1.5, 1."""
    return make_set(tiny_index, CLUE, IDS, SCORES)


def make_set(index: Index, clue: str, ids: list[str], scores: np.ndarray) -> CandidateSet:
    """A CandidateSet built by hand: candidates in the given order, ranks 1..n."""
    return CandidateSet(
        index=index,
        clue=clue,
        words=index.analyzer.words(clue),
        tokens=index.analyzer.tokens(clue),
        rows=np.array([index.row_of(i) for i in ids], dtype=np.int64),
        scores=np.asarray(scores, dtype=np.float64),
        ranks=np.arange(1, len(ids) + 1, dtype=np.int64),
    )


def close(actual: np.ndarray, expected: list[float] | np.ndarray) -> None:
    """Arrays equal to 1e-12 (the features are plain float64 arithmetic)."""
    np.testing.assert_allclose(actual, np.asarray(expected, dtype=np.float64), rtol=0, atol=1e-12)


# -- retrieval -----------------------------------------------------------------------------
def test_bm25_score_equals_rank_bm25_okapi(tiny_index: Index) -> None:
    # Reference: rank_bm25's BM25Okapi (k1=1.5, b=0.75, epsilon=0.25, its defaults, which the
    # index uses) on the same analyzed body tokens. The feature is the score the hit carries.
    assert tiny_index.title_weight == 0.0
    corpus = [
        tiny_index.analyzer.tokens(r) for r in [tiny_index.document(i).text for i in tiny_index.ids]
    ]
    ref = BM25Okapi(corpus).get_scores(tiny_index.analyzer.tokens(CLUE))
    hits = tiny_index.search(CLUE, k=5)
    got = B.bm25_score(candidate_set(tiny_index, CLUE, hits))
    # rtol 1e-6: the index may store its weights as float32 (about 7 significant digits).
    np.testing.assert_allclose(got, ref[[h.row for h in hits]], rtol=1e-6)


def test_rank_and_inverse_rank(cs: CandidateSet) -> None:
    close(B.bm25_rank(cs), [1, 2, 3, 4, 5])
    close(B.inverse_rank(cs), [1, 1 / 2, 1 / 3, 1 / 4, 1 / 5])


def test_gaps(cs: CandidateSet) -> None:
    # scores 5, 4, 2, 1.5, 1: next-gaps 1, 2, 0.5, 0.5 and 0 for the last;
    # the leader's best rival is 4 (gap +1), everyone else's rival is the leader 5.
    close(B.gap_to_next(cs), [1, 2, 0.5, 0.5, 0])
    close(B.gap_to_best_rival(cs), [1, -1, -3, -3.5, -4])


def test_ratio_zscore_softmax(cs: CandidateSet) -> None:
    close(B.score_ratio_to_top(cs), [1, 0.8, 0.4, 0.3, 0.2])
    # Mean 13.5 / 5 = 2.7; population variance (2.3^2 + 1.3^2 + 0.7^2 + 1.2^2 + 1.7^2) / 5
    # = 11.8 / 5 = 2.36. Reference: scipy.stats.zscore (ddof=0) agrees.
    sd = math.sqrt(2.36)
    close(B.score_zscore(cs), [(s - 2.7) / sd for s in SCORES])
    close(B.score_zscore(cs), scipy.stats.zscore(SCORES))
    # softmax_i = e^{s_i} / sum_j e^{s_j}; reference scipy.special.softmax.
    total = sum(math.exp(s) for s in SCORES)
    close(B.score_softmax(cs), [math.exp(s) / total for s in SCORES])
    close(B.score_softmax(cs), scipy.special.softmax(SCORES))


def test_score_features_of_degenerate_candidate_lists(tiny_index: Index) -> None:
    # One candidate: no rival and no spread, so gaps and z-score are 0, ratio and share are 1.
    one = make_set(tiny_index, CLUE, ["a1"], np.array([3.0]))
    close(B.gap_to_next(one), [0])
    close(B.gap_to_best_rival(one), [0])
    close(B.score_zscore(one), [0])
    close(B.score_ratio_to_top(one), [1])
    close(B.score_softmax(one), [1])
    # Equal scores: z-score 0 (not 0/0), equal shares; a top score of 0 gives ratios of 0.
    tied = make_set(tiny_index, CLUE, ["a1", "a2"], np.array([2.0, 2.0]))
    close(B.score_zscore(tied), [0, 0])
    close(B.score_softmax(tied), [0.5, 0.5])
    close(B.gap_to_best_rival(tied), [0, 0])
    zero = make_set(tiny_index, CLUE, ["a1", "a2"], np.array([0.0, 0.0]))
    close(B.score_ratio_to_top(zero), [0, 0])


# -- clue length ---------------------------------------------------------------------------
def test_clue_length_features(cs: CandidateSet) -> None:
    assert cs.words == ["which", "grey", "river", "town", "near", "pellomir", "has", "stone"]
    close(B.clue_words(cs), [8] * 5)
    close(B.log_clue_words(cs), [LOG(9)] * 5)
    close(B.score_x_clue_words(cs), SCORES * 8)
    close(B.softmax_x_log_words(cs), scipy.special.softmax(SCORES) * LOG(9))


# -- popularity ----------------------------------------------------------------------------
def test_inlinks_and_their_log(cs: CandidateSet) -> None:
    # a1 <- a2, a3, a4 (a4 links by a differently-cased title); a2 <- a1, a3; a3 <- a1;
    # a4 none; a5 only links to itself. a3's repeated link counts once.
    close(B.inlinks(cs), [3, 2, 1, 0, 0])
    # Raw counts are long-tailed, the log is closer to normal (common practice, no source).
    close(B.log_inlinks(cs), [LOG(4), LOG(3), LOG(2), 0, 0])
    close(B.log_inlinks_vs_best(cs), [0, LOG(3) - LOG(4), LOG(2) - LOG(4), -LOG(4), -LOG(4)])


def test_popularity_and_missing(cs: CandidateSet) -> None:
    # popularity 99, absent, 0, 3, 7: the absent one counts as 0 and is flagged.
    close(B.log_popularity(cs), [LOG(100), 0, 0, LOG(4), LOG(8)])
    close(B.popularity_missing(cs), [0, 1, 0, 0, 0])


# -- qualifier -----------------------------------------------------------------------------
def test_qualifier_features(cs: CandidateSet) -> None:
    # qualifiers: river, town, (none), river, "stone instrument"
    close(B.has_qualifier(cs), [1, 1, 0, 1, 1])
    close(B.qualifier_in_clue(cs), [1, 1, 0, 1, 1])
    close(B.qualifier_overlap(cs), [1, 1, 0, 1, 0.5])
    # titles sharing the qualifier: river 2, town 1, none -> 0, stone instrument 1
    close(B.qualifier_frequency(cs), [LOG(3), LOG(2), 0, LOG(3), LOG(2)])


# -- leakage -------------------------------------------------------------------------------
def test_title_and_alias_overlap(cs: CandidateSet) -> None:
    # base names: Ostrel, Varn Stone, Pellomir, Kesvin, Drum -> stone (1 of 2), pellomir (1 of 1).
    close(B.title_overlap(cs), [0, 0.5, 1, 0, 0])
    # aliases: a1 {old, ostrel} -> 0; a3 {pellomir, hill, grey} -> 2 of 3; the rest have none.
    close(B.alias_overlap(cs), [0, 0, 2 / 3, 0, 0])


# -- term overlap --------------------------------------------------------------------------
def test_matched_terms_fraction_rarity(cs: CandidateSet) -> None:
    # a1: grey stone; a2: river town stone; a3: grey town pellomir; a4: river; a5: stone.
    close(B.matched_terms(cs), [2, 3, 3, 1, 1])
    close(B.matched_fraction(cs), [2 / 5, 3 / 5, 3 / 5, 1 / 5, 1 / 5])
    grey = river = town = LOG(5 / 2)
    pellomir, stone = LOG(5), LOG(5 / 3)
    close(
        B.matched_rarity(cs),
        [grey + stone, river + town + stone, grey + town + pellomir, river, stone],
    )


def test_doc_length(cs: CandidateSet) -> None:
    # body terms: 6, 10 ("a" is one letter, below the token pattern), 5, 4, 4
    close(B.log_doc_length(cs), [LOG(7), LOG(11), LOG(6), LOG(5), LOG(5)])


def test_clue_without_known_terms(tiny_index: Index) -> None:
    none = make_set(tiny_index, "zzz qqq", ["a1", "a2"], np.array([1.0, 0.5]))
    close(B.matched_terms(none), [0, 0])
    close(B.matched_fraction(none), [0, 0])
    close(B.matched_rarity(none), [0, 0])


# -- the registry --------------------------------------------------------------------------
EXPECTED = {
    "retrieval": [
        "bm25_score", "bm25_rank", "inverse_rank", "gap_to_next", "gap_to_best_rival",
        "score_ratio_to_top", "score_zscore", "score_softmax",
    ],
    "length": ["clue_words", "log_clue_words", "score_x_clue_words", "softmax_x_log_words"],
    "popularity": [
        "inlinks", "log_inlinks", "log_inlinks_vs_best", "log_popularity", "popularity_missing",
    ],
    "qualifier": ["has_qualifier", "qualifier_in_clue", "qualifier_overlap"],
    "leakage": ["title_overlap", "alias_overlap"],
    "overlap": [
        "matched_terms", "matched_fraction", "matched_rarity", "log_doc_length",
        "qualifier_frequency",
    ],
    "dense": [
        "cosine", "cosine_gap_to_best", "dense_inverse_rank", "fused_inverse_rank",
        "in_both_pools",
    ],
}  # fmt: skip


def test_registry_lists_every_feature_once_with_a_description() -> None:
    reg = default_registry()
    assert reg.groups() == EXPECTED
    assert len(reg.names) == len(set(reg.names)) == sum(len(v) for v in EXPECTED.values())
    for name in reg.names:
        desc = reg[name].description
        assert desc.strip() and "\n" not in desc, name


def test_matrix_columns_are_the_feature_functions(cs: CandidateSet) -> None:
    reg = default_registry()
    x = reg.matrix(cs, reg.names)
    assert x.shape == (5, len(reg.names)) and x.dtype == np.float64
    for j, name in enumerate(reg.names):
        close(x[:, j], getattr(B, name)(cs))


def test_matrix_of_no_candidates(tiny_index: Index) -> None:
    empty = make_set(tiny_index, CLUE, [], np.array([]))
    assert default_registry().matrix(empty, ["bm25_score", "inlinks"]).shape == (0, 2)


def test_dense_features_by_hand(cs: CandidateSet) -> None:
    # Five candidates; the vectors' side as a hybrid set would carry it.
    dense = DenseInfo(
        cosine=np.array([0.2, 0.9, 0.5, 0.0, 0.4]),
        dense_rank=np.array([3, 1, 0, 0, 2]),  # 0: the vectors did not propose it
        fused_rank=np.array([2, 1, 3, 5, 4]),
        in_both=np.array([True, True, False, False, True]),
    )
    hybrid = dataclasses.replace(cs, dense=dense, memo={})
    close(B.cosine(hybrid), [0.2, 0.9, 0.5, 0.0, 0.4])
    close(B.cosine_gap_to_best(hybrid), [-0.7, 0.0, -0.4, -0.9, -0.5])
    close(B.dense_inverse_rank(hybrid), [1 / 3, 1, 0, 0, 1 / 2])
    close(B.fused_inverse_rank(hybrid), [1 / 2, 1, 1 / 3, 1 / 5, 1 / 4])
    close(B.in_both_pools(hybrid), [1, 1, 0, 0, 1])
    # A BM25-only set: no vectors, so cosine, gaps and pool flags are 0 and the fused
    # position is the BM25 rank.
    close(B.cosine(cs), np.zeros(5))
    close(B.cosine_gap_to_best(cs), np.zeros(5))
    close(B.dense_inverse_rank(cs), np.zeros(5))
    close(B.fused_inverse_rank(cs), 1.0 / cs.ranks)
    close(B.in_both_pools(cs), np.zeros(5))
