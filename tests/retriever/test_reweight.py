"""An index re-weighted in memory equals a fresh build with the same BM25 parameters."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
from rank_bm25 import BM25Okapi

from retriever import BM25Params, build_index
from retriever.reweight import Reweighter, reweighted

from .helpers import PLAIN, plain_index, write_jsonl

# Every token has two or more letters: the analyzer keeps exactly these words.
DOCS = [
    ["grey", "stone", "bridge", "over", "the", "river", "stone"],
    ["river", "boats", "moor", "near", "the", "quay"],
    ["one", "green", "field", "with", "sheep", "and", "one", "stone", "wall", "by", "the", "river"],
    ["stone"],
    ["sheep", "sheep", "sheep", "field"],
]


@pytest.mark.parametrize(
    "params",
    [
        {"k1": 0.6, "b": 1.0},
        {"k1": 2.0, "b": 0.3, "idf": "lucene"},
        {"k1": 1.2, "b": 0.0, "epsilon": 0.1, "title_weight": 0.5},
    ],
)
def test_weights_equal_a_fresh_build_bit_for_bit(
    tmp_path: Path, small_records: list[dict[str, Any]], params: dict[str, Any]
) -> None:
    corpus = write_jsonl(tmp_path / "c.jsonl", small_records)
    base = build_index(corpus, tmp_path / "base", vectors=False)
    fresh = build_index(corpus, tmp_path / "fresh", vectors=False, **params)
    again = reweighted(base, BM25Params(**params))
    assert again.body.weight.dtype == fresh.body.weight.dtype
    assert np.array_equal(again.body.weight, fresh.body.weight)
    assert np.array_equal(again.title_field.weight, fresh.title_field.weight)
    assert again.params == fresh.params and again.title_weight == fresh.title_weight
    assert again.version == fresh.version  # the version the rebuilt folder will carry
    query = "reed baskets from the marsh river"
    assert [(h.doc_id, h.score) for h in again.search(query, 5)] == [
        (h.doc_id, h.score) for h in fresh.search(query, 5)
    ]
    # The index it came from is left as it was.
    assert base.params == BM25Params() and base.body.weight is not again.body.weight


def test_reweighted_scores_match_rank_bm25(tmp_path: Path) -> None:
    # Reference: rank_bm25.BM25Okapi(k1=, b=) on the same tokens, for parameters the index
    # was not built with.
    base = plain_index(tmp_path, DOCS)
    rw = Reweighter(base)
    vocab = sorted({t for d in DOCS for t in d})
    for k1, b in ((0.4, 0.3), (0.9, 1.0), (2.0, 0.5)):
        idx = rw.with_params(BM25Params(k1=k1, b=b))
        ref = BM25Okapi(DOCS, k1=k1, b=b)
        for query in (["stone", "river"], ["sheep", "field", "sheep"], vocab):
            assert np.allclose(idx.score_tokens(query), ref.get_scores(query), rtol=1e-5)


def test_index_built_with_other_parameters_goes_back_to_the_defaults(tmp_path: Path) -> None:
    odd = plain_index(tmp_path, DOCS, "odd", k1=0.4, b=0.2, idf="lucene")
    plain = plain_index(tmp_path, DOCS, "plain")
    back = reweighted(odd, BM25Params())
    assert np.array_equal(back.body.weight, plain.body.weight)
    assert back.manifest["bm25"] == plain.manifest["bm25"] == BM25Params().to_dict()
    assert PLAIN["stemmer"] is None  # the plain analyzer: the two builds tokenise alike
