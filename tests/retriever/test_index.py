"""Searching a loaded index: candidates, top-k, batch search, lookups and load errors."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rank_bm25 import BM25Okapi

from retriever import IndexFormatError, UnknownDocumentError, build_index, load_index
from retriever.store import MANIFEST

from .foldoc import synthetic_articles
from .helpers import PLAIN, plain_index

DOCS = [
    ["red", "fox", "jumps"],
    ["lazy", "dog", "sleeps", "dog"],
    ["red", "dog"],
    ["blue", "whale", "sings"],
    ["fox", "and", "dog", "play"],
]


def brute_force(scores: np.ndarray, k: int) -> list[int]:
    """Rows of the k best non-zero scores, ties by row: the reference ranking."""
    rows = [r for r in range(scores.size) if scores[r] != 0]
    return sorted(rows, key=lambda r: (-scores[r], r))[:k]


def test_unknown_tokens_are_dropped(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, DOCS)
    base = idx.score_tokens(["dog"])
    assert np.array_equal(idx.score_tokens(["dog", "zebra", "unicorn"]), base)
    assert [h.row for h in idx.search("dog zebra")] == [h.row for h in idx.search("dog")]


def test_no_known_token_gives_no_candidates(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, DOCS)
    assert idx.search("zebra unicorn") == []
    assert idx.search("") == []
    assert idx.search_tokens([]) == []
    assert idx.search_many(["zebra", "dog"])[0] == []


def test_k_larger_than_corpus(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, DOCS)
    hits = idx.search("dog fox red", k=1000)
    # Only articles holding a query term are candidates.
    assert sorted(h.row for h in hits) == [0, 1, 2, 4]
    assert [h.rank for h in hits] == [1, 2, 3, 4]
    with pytest.raises(ValueError):
        idx.search("dog", k=0)


def test_search_matches_rank_bm25_order(tmp_path: Path) -> None:
    # Reference: rank_bm25.BM25Okapi scores, ranked by score then row.
    idx = plain_index(tmp_path, DOCS)
    ref = BM25Okapi(DOCS)
    for query in (["dog"], ["red", "fox"], ["dog", "dog", "whale"], ["play", "sings", "red"]):
        hits = idx.search_tokens(query, k=3)
        assert [h.row for h in hits] == brute_force(ref.get_scores(query), 3)
        assert [h.doc_id for h in hits] == [idx.ids[h.row] for h in hits]


def test_search_many_equals_single_searches(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, DOCS)
    clues = ["dog", "red fox", "nothing here", "whale dog fox"]
    assert idx.search_many(clues, k=2) == [idx.search(c, k=2) for c in clues]
    many = clues * 40  # big enough for the default to use threads
    single = [idx.search(c, k=2) for c in many]
    assert idx.search_many(many, k=2) == single
    assert idx.search_many(many, k=2, threads=3) == single
    assert idx.search_many(many, k=2, threads=1) == single


WORDS = st.sampled_from([f"w{i}" for i in range(30)])


@settings(max_examples=40, deadline=None)
@given(
    docs=st.lists(st.lists(WORDS, min_size=1, max_size=30), min_size=2, max_size=60),
    query=st.lists(WORDS, min_size=1, max_size=12),
    k=st.integers(1, 8),
)
def test_top_k_equals_brute_force(
    tmp_path_factory: pytest.TempPathFactory, docs: list[list[str]], query: list[str], k: int
) -> None:
    # Reference: sorting every rank_bm25.BM25Okapi score; the floor-based pruning of the
    # top-k must never change which articles come back or their order.
    idx = plain_index(tmp_path_factory.mktemp("t"), docs)
    ref = BM25Okapi(docs).get_scores(query)
    hits = idx.search_tokens(query, k=k)
    ours = [h.row for h in hits]
    expected = brute_force(ref, k)
    assert np.allclose([ref[r] for r in ours], [ref[r] for r in expected], rtol=1e-9, atol=1e-12)
    assert len(ours) == len(expected)


def test_ties_are_broken_by_row(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, [["same", "xy"], ["other"], ["same", "xy"], ["same", "xy"]])
    hits = idx.search("same", k=3)
    assert [h.row for h in hits] == [0, 2, 3]
    assert hits[0].score == hits[1].score == hits[2].score


def test_documents_and_names(tmp_path: Path, small_records: list[dict[str, Any]]) -> None:
    idx = build_index(small_records, tmp_path / "idx")
    doc = idx.document("m1")
    assert (doc.title, doc.base, doc.qualifier) == ("Quillfen (river)", "Quillfen", "river")
    assert doc.aliases == ("Quill river",) and doc.popularity == 12.5
    assert idx.document("m3").popularity is None
    assert idx.document("m4").metadata == {"kind": "place"}
    assert idx.document_at(idx.row_of("m2")).id == "m2"
    assert idx.resolve("m5") == "m5"  # id
    assert idx.resolve("Tallmere") == "m3"  # exact title
    assert idx.resolve("  quillfen   (VILLAGE) ") == "m2"  # normalized title
    assert idx.resolve("Quill river") == "m1"  # alias
    assert idx.resolve("Nowhere Land") is None
    with pytest.raises(UnknownDocumentError):
        idx.document("nope")
    assert idx.bases[0] == "Quillfen" and idx.qualifiers[0] == "river"
    assert len(idx) == idx.n_docs == 5 and idx.doc_len.shape == (5,)
    assert idx.version == idx.manifest["index_version"]


def test_load_errors(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, DOCS)
    folder = idx.path
    (tmp_path / "empty").mkdir()
    cases = [tmp_path / "missing", tmp_path / "empty"]
    for path in cases:
        with pytest.raises(IndexFormatError, match="index"):
            load_index(path)
    manifest = json.loads((folder / MANIFEST).read_text())
    (folder / MANIFEST).write_text(json.dumps({**manifest, "format_version": 99}))
    with pytest.raises(IndexFormatError, match="version 99"):
        load_index(folder)
    (folder / MANIFEST).write_text("{not json")
    with pytest.raises(IndexFormatError, match="not valid JSON"):
        load_index(folder)
    (folder / MANIFEST).write_text(json.dumps(manifest))
    assert load_index(folder).n_docs == len(DOCS)


@pytest.mark.parametrize("damage", ["delete", "truncate", "garbage"])
def test_missing_or_corrupt_array(tmp_path: Path, damage: str) -> None:
    idx = build_index(
        [{"id": str(i), "title": f"t{i}", "text": " ".join(d)} for i, d in enumerate(DOCS)],
        tmp_path / "idx",
        **PLAIN,
    )
    array = idx.path / "body_weight.npy"
    del idx
    if damage == "delete":
        array.unlink()
    elif damage == "truncate":
        array.write_bytes(array.read_bytes()[:-16])
    else:
        array.write_bytes(b"\x00" * 40)
    with pytest.raises(IndexFormatError, match="body_weight"):
        load_index(tmp_path / "idx")


def test_article_terms_are_each_articles_distinct_known_terms(tmp_path: Path) -> None:
    records = list(synthetic_articles(300, seed=11))
    idx = build_index(records, tmp_path / "idx")
    rows = np.array([0, 7, 7, 299, 150])
    terms, lengths = idx.article_terms(rows)
    assert lengths.tolist() == [int(n) for n in np.diff(idx._fwd_indptr)[rows]]
    pos = 0
    for row, n in zip(rows.tolist(), lengths.tolist(), strict=True):
        tokens = idx.analyzer.tokens(idx.document_at(row).text)
        expected = sorted({int(t) for t in idx.vocab.lookup(tokens).tolist() if t >= 0})
        assert terms[pos : pos + n].tolist() == expected
        pos += n
    empty_terms, empty_lengths = idx.article_terms(np.array([], dtype=np.int64))
    assert empty_terms.size == 0 and empty_lengths.size == 0
