"""A sharded folder read as one index (`ShardedView`) gives a single index's rows and hits.

The reference is a single build of the same corpus (retriever/build.py). Both builds run in
this process (no Ray): the view is what sharded serving ranks with, searches included.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from retriever import IndexFormatError, build_index, load_index
from retriever.errors import FilterError
from retriever.index import Index
from retriever.shards import build_sharded
from retriever.shardview import ShardedView

DEMO = Path(__file__).resolve().parents[2] / "corpus_demo" / "data" / "articles.jsonl"
SPANS = [(0, 400), (400, 2300)]  # two shards of very different sizes, the rest third


@pytest.fixture(scope="module")
def pair(tmp_path_factory: pytest.TempPathFactory) -> tuple[Index, ShardedView]:
    tmp = tmp_path_factory.mktemp("view")
    n = sum(1 for line in DEMO.read_text("utf-8").splitlines() if line)
    build_index(DEMO, tmp / "single", vectors=False)
    sharded = build_sharded(DEMO, tmp / "sharded", spans=[*SPANS, (2300, n)])
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


def test_a_filter_on_the_sharded_view_is_refused_plainly_and_snippets_read_the_shards(
    pair: tuple[Index, ShardedView],
) -> None:
    single, view = pair
    with pytest.raises(FilterError, match="not available on a sharded index"):
        view.filter_mask({"kind": "town"})
    with pytest.raises(FilterError, match="not available on a sharded index"):
        view.search_token_lists([["river"]], 5, allowed=np.ones(view.n_docs, dtype=bool))
    for row in (0, view.n_docs // 2, view.n_docs - 1):
        assert view.text_of(row) == single.text_of(row)
