"""A sharded folder read as one index (`ShardedView`) gives a single index's rows and hits.

The reference is a single build of the same corpus (retriever/build.py). Both builds run in
this process (no Ray): the view is what sharded serving ranks with, searches included.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from retriever import IndexFormatError, build_index, load_index
from retriever.errors import FilterError
from retriever.index import Index
from retriever.shardfanout import LocalShards
from retriever.shards import build_sharded
from retriever.shardview import ShardedView

from .helpers import write_jsonl

DEMO = Path(__file__).resolve().parents[2] / "corpus_demo" / "data" / "articles.jsonl"
QUESTIONS = DEMO.parent / "questions_test.jsonl"
SPANS = [(0, 400), (400, 2300)]  # two shards of very different sizes, the rest third
# Small, and on one gensim thread: the only setting that trains the very same vectors twice.
VECTORS = {"dim": 32, "threads": 1, "epochs": 2}


@pytest.fixture(scope="module")
def pair(tmp_path_factory: pytest.TempPathFactory) -> tuple[Index, ShardedView]:
    tmp = tmp_path_factory.mktemp("view")
    n = sum(1 for line in DEMO.read_text("utf-8").splitlines() if line)
    build_index(DEMO, tmp / "single", vectors=VECTORS)
    sharded = build_sharded(DEMO, tmp / "sharded", spans=[*SPANS, (2300, n)], vectors=VECTORS)
    return load_index(tmp / "single"), ShardedView(sharded)


def test_rows_read_through_the_shards_equal_one_index(pair: tuple[Index, ShardedView]) -> None:
    single, view = pair
    assert view.n_docs == single.n_docs and view.n_terms == single.n_terms
    rng = np.random.default_rng(5)
    rows = rng.integers(0, single.n_docs, 300)
    rows[:3] = [0, 399, single.n_docs - 1]  # the shards' edges
    for col in ("ids", "titles", "bases", "qualifiers", "aliases"):
        assert getattr(view, col).take(rows) == getattr(single, col).take(rows), col
    assert view.ids[-1] == single.ids[-1] and view.titles[400] == single.titles[400]
    assert list(view.qualifiers) == list(single.qualifiers)
    for row in rows[:40].tolist():
        doc_id = single.ids[row]
        assert view.row_of(doc_id) == row
        assert view.document(doc_id) == single.document(doc_id)
        assert view.resolve(single.titles[row]) == single.resolve(single.titles[row])
    assert view.ids.find("no-such-article") is None
    with pytest.raises(IndexError):
        view.ids[single.n_docs]
    # What the features read by global row and by term.
    for name in ("doc_len", "inlinks", "popularity"):
        np.testing.assert_array_equal(getattr(view, name), getattr(single, name))
    np.testing.assert_array_equal(view.body.indptr, single.body.indptr)  # document frequencies
    for a, b in zip(view.article_term_lists(), single.article_term_lists(), strict=True):
        np.testing.assert_array_equal(a, b)


def test_searches_merge_as_one_index(pair: tuple[Index, ShardedView]) -> None:
    single, view = pair
    titles = single.titles.take(np.arange(0, single.n_docs, 17))
    token_lists = [single.analyzer.tokens(t + " history") for t in titles]
    assert view.search_token_lists(token_lists, 20) == single.search_token_lists(token_lists, 20)
    tokens = token_lists[3]
    np.testing.assert_array_equal(view.score_tokens(tokens), single.score_tokens(tokens))
    tids, _ = single.term_ids(tokens)
    weights = np.ones(tids.size)
    rows = np.arange(0, single.n_docs, 7)
    sorted_tids = np.sort(tids).astype(np.int64)
    for a, b in zip(
        view.term_overlap(rows, sorted_tids, weights),
        single.term_overlap(rows, sorted_tids, weights),
        strict=True,
    ):
        np.testing.assert_array_equal(a, b)


def test_a_shard_with_other_statistics_is_named(
    pair: tuple[Index, ShardedView], tmp_path: Path
) -> None:
    import shutil

    _, view = pair
    copy = tmp_path / "sh"
    shutil.copytree(view.path, copy)
    manifest = copy / "shard-002" / "manifest.json"
    data = json.loads(manifest.read_text(encoding="utf-8"))
    data["shard"]["stats_sha256"] = "f" * 64
    manifest.write_text(json.dumps(data), encoding="utf-8")
    with pytest.raises(IndexFormatError, match=r"shard-002.*statistics checksum ffffffffffff"):
        ShardedView(copy)


def test_snippets_read_the_shards(pair: tuple[Index, ShardedView]) -> None:
    single, view = pair
    for row in (0, view.n_docs // 2, view.n_docs - 1):
        assert view.text_of(row) == single.text_of(row)


# Filters on the demo's metadata (every field a string; each shard has its own code list).
DEMO_FILTERS: list[dict[str, Any]] = [
    {"kind": "town"},
    {"kind": {"in": ["river", "song", "no-such-kind"]}},
    {"category": "work", "era": {"eq": "High Lantern Age"}},
    {"kind": "no-such-kind"},
]


def test_filters_on_the_sharded_view_equal_the_single_index(
    pair: tuple[Index, ShardedView],
) -> None:
    single, view = pair
    titles = single.titles.take(np.arange(0, single.n_docs, 53))
    token_lists = [single.analyzer.tokens(t + " river festival") for t in titles]
    for spec in DEMO_FILTERS:
        mask = single.filter_mask(spec)
        np.testing.assert_array_equal(view.filter_mask(spec), mask)
        want = single.search_token_lists(token_lists, 10, allowed=mask)
        assert view.search_token_lists(token_lists, 10, allowed=mask) == want, spec
    assert 0 < int(single.filter_mask({"kind": "town"}).sum()) < single.n_docs
    with pytest.raises(FilterError, match="no article has this metadata field") as err:
        view.filter_mask({"colour": "red"})
    with pytest.raises(FilterError) as want_err:
        single.filter_mask({"colour": "red"})
    assert str(err.value) == str(want_err.value)


def test_dense_search_through_the_shards_equals_the_single_index(
    pair: tuple[Index, ShardedView],
) -> None:
    single, view = pair
    assert single.dense is not None and view.dense is not None
    clues = [json.loads(line)["clue"] for line in QUESTIONS.read_text("utf-8").splitlines()[:80]]
    queries = [single.dense.vectors.query_vector(*single.term_ids(single.analyzer.tokens(c)))
               for c in clues]  # fmt: skip
    mine = [view.dense.vectors.query_vector(*view.term_ids(view.analyzer.tokens(c))) for c in clues]
    for a, b in zip(queries, mine, strict=True):
        assert (a is None and b is None) or np.array_equal(a, b)
    mask = single.filter_mask({"category": "place"})
    for allowed in (None, mask):
        want = single.dense.search(queries, 30, allowed=allowed)
        got = view.dense.search(queries, 30, allowed=allowed)
        for (wr, ws), (gr, gs) in zip(want, got, strict=True):
            np.testing.assert_array_equal(gr, wr)
            np.testing.assert_array_equal(gs, ws)
    # Every shard contributes to the merged lists (they are uneven on purpose).
    rows = np.concatenate([r for r, _ in view.dense.search(queries, 30)])
    assert len(set(np.searchsorted(view.first_rows, rows, side="right").tolist())) == 3
    for options in ({}, {"fusion": "rrf", "pool": 30}, {"weight": 0.8, "pool": 7}):
        want_h = single.search_hybrid_many(clues, 10, **options)  # type: ignore[arg-type]
        assert view.search_hybrid_many(clues, 10, **options) == want_h  # type: ignore[arg-type]
    rows = np.arange(0, single.n_docs, 11)
    tokens = single.analyzer.tokens(clues[0])
    assert view.score_rows(tokens, rows) == single.score_rows(tokens, rows)


def _meta_record(i: int) -> dict[str, Any]:
    """Article i of 30 in three shards of 10: metadata whose per-shard typing differs."""
    meta: dict[str, Any] = {"kind": ["harbour", "mill", "bridge", "abbey"][(i * 7) % 4]}
    if i >= 10:  # shard 0 has no "flag" at all
        meta["flag"] = i % 3 == 0
    meta["year"] = 1700 + 13 * i if i < 20 else f"about {1700 + 13 * i}"  # mixed overall
    meta["size"] = float(i % 5) if i % 4 else None  # null counts as lacking it
    if i in (4, 25):
        meta["kind"] = "acorn"  # first and last shards only; sorting first, it shifts codes
    return {"id": f"m{i}", "title": f"Place {i}", "text": f"stone river mill {i}", "metadata": meta}


def test_a_filter_means_the_same_on_every_shard(tmp_path: Path) -> None:
    """Each shard types its metadata over its own articles: "year" is a number in two shards
    and a string in the third (mixed, as the single index decides), "flag" is absent from
    the first, and the string codes of "kind" differ from shard to shard."""
    corpus = write_jsonl(tmp_path / "m.jsonl", [_meta_record(i) for i in range(30)])
    single = Index(build_index(corpus, tmp_path / "single", vectors=False).path)
    view = ShardedView(
        build_sharded(corpus, tmp_path / "sh", spans=[(0, 10), (10, 20), (20, 30)], vectors=False)
    )
    # The premise: the shards' own code lists differ, so codes alone would mean other values.
    lists = [s.meta_columns.fields["kind"].values for s in view.shards]
    assert lists[0] != lists[1] and "flag" not in view.shards[0].meta_columns.fields
    assert view.shards[0].meta_columns.fields["year"].kind == "number"
    specs: list[dict[str, Any]] = [
        {"kind": "acorn"},
        {"kind": "mill"},
        {"kind": {"in": ["abbey", "acorn"]}},
        {"flag": True},
        {"flag": False, "kind": "bridge"},
        {"size": {"gte": 2, "lt": 4}},
        {"size": 0},
    ]
    for spec in specs:
        np.testing.assert_array_equal(view.filter_mask(spec), single.filter_mask(spec), str(spec))
    assert 0 < int(view.filter_mask({"kind": "acorn"}).sum()) < 30
    for spec in ({"year": {"gt": 1800}}, {"flag": "yes"}, {"nothing": 1}):
        with pytest.raises(FilterError) as want:
            single.filter_mask(spec)
        with pytest.raises(FilterError) as got:
            view.filter_mask(spec)
        assert str(got.value) == str(want.value)


def test_ties_across_shards_break_by_global_row(tmp_path: Path) -> None:
    """Five texts, each written six times across three shards: every copy has the same BM25
    score and the same article vector, so each list is all ties, which one index orders by
    row; the merged BM25 and dense lists must too."""
    texts = [
        "stone river mill harbour",
        "river bridge abbey stone",
        "harbour mill bridge tower",
        "abbey tower stone river",
        "mill harbour abbey bridge",
    ]
    records = [{"id": f"t{i}", "title": f"Copy {i}", "text": texts[i % 5]} for i in range(30)]
    corpus = write_jsonl(tmp_path / "t.jsonl", records)
    vec = {"dim": 8, "threads": 1, "epochs": 2, "min_count": 1}
    single = Index(build_index(corpus, tmp_path / "single", vectors=vec).path)
    spans = [(0, 7), (7, 19), (19, 30)]
    view = ShardedView(build_sharded(corpus, tmp_path / "sh", spans=spans, vectors=vec))
    assert single.dense is not None and view.dense is not None
    tokens = single.analyzer.tokens("harbour stone")
    query = single.dense.vectors.query_vector(*single.term_ids(tokens))
    for k in (3, 8, 13):
        ((want_rows, want_cos),) = single.dense.search([query], k)
        ((got_rows, got_cos),) = view.dense.search([query], k)
        assert np.unique(want_cos).size < want_cos.size  # the premise: ties
        np.testing.assert_array_equal(got_rows, want_rows)
        np.testing.assert_array_equal(got_cos, want_cos)
        assert view.search_tokens(tokens, k) == single.search_tokens(tokens, k)


class CountingShards(LocalShards):
    """The real in-process fan-out, counting the rounds of calls it sends to the shards."""

    def __init__(self, view: ShardedView) -> None:
        super().__init__(view.shards, view.first_rows)
        self.rounds: list[str] = []

    def each(self, method: str, args: Any) -> list[Any]:
        self.rounds.append(method)
        return super().each(method, args)


def test_hybrid_candidates_come_from_one_round_of_shard_calls_and_equal_one_index(
    pair: tuple[Index, ShardedView],
) -> None:
    from reranker.candidates import CandidatePolicy, find_candidates

    single, view = pair
    counting = CountingShards(view)
    counted = ShardedView(view.path, counting)
    lines = QUESTIONS.read_text("utf-8").splitlines()[:40]
    tokens = [single.analyzer.tokens(json.loads(line)["clue"]) for line in lines]
    mask = single.filter_mask({"category": "place"})
    for policy in (CandidatePolicy("hybrid", 0.5, 30), CandidatePolicy("hybrid", 0.2, 12, "rrf")):
        for allowed in (None, mask):
            want = find_candidates(single, tokens, 10, policy, allowed)
            for t, w in zip(tokens, want, strict=True):
                counting.rounds.clear()
                [(hits, info)] = find_candidates(counted, [t], 10, policy, allowed)
                assert counting.rounds == ["pools"]  # BM25 and dense together, no third round
                assert hits == w[0]
                assert info is not None and w[1] is not None
                for a, b in zip(vars(info).values(), vars(w[1]).values(), strict=True):
                    np.testing.assert_array_equal(a, b)
