"""Metadata filters: the compiled mask, and searches that apply it before their top-k cut.

Every expected result is computed here by brute force over the articles the filter keeps
(all scores of the corpus, or all dot products), never taken from the code under test.
"""

from __future__ import annotations

import json
import random
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from retriever import FilterError, IndexFormatError, build_index, load_index, update_index
from retriever.dense import dot
from retriever.index import Index
from retriever.metacolumns import FIELDS_FILE

KINDS = ["town", "river", "ship", "song"]
WORDS = [f"w{i}{c}" for i in range(60) for c in "ab"]  # invented two-letter-plus words


def _records(n: int, seed: int) -> list[dict[str, Any]]:
    rng = random.Random(seed)
    out = []
    for i in range(n):
        meta: dict[str, Any] = {"kind": rng.choice(KINDS), "old": rng.random() < 0.5}
        if i % 7:  # every seventh article has no year
            meta["year"] = rng.randrange(1700, 2000)
        meta["tags"] = ["a"] if i % 2 else "b"  # a list and a string: not filterable
        text = " ".join(rng.choice(WORDS) for _ in range(rng.randrange(5, 40)))
        out.append({"id": f"d{i}", "title": f"Entry {i}", "text": text, "metadata": meta})
    return out


def _keeps(meta: dict[str, Any], spec: dict[str, Any]) -> bool:
    """Reference semantics of a filter, written out plainly for the test."""
    for name, cond in spec.items():
        if meta.get(name) is None:
            return False
        v = meta[name]
        conds = cond if isinstance(cond, dict) else {"eq": cond}
        for op, arg in conds.items():
            ok = {
                "eq": lambda a, v=v: v == a and type(v) is type(a),
                "in": lambda a, v=v: v in a,
                "gt": lambda a, v=v: v > a,
                "gte": lambda a, v=v: v >= a,
                "lt": lambda a, v=v: v < a,
                "lte": lambda a, v=v: v <= a,
            }[op](arg)
            if not ok:
                return False
    return True


SPECS = [
    {"kind": "town"},
    {"kind": {"in": ["river", "ship"]}},
    {"kind": {"in": ["nowhere"]}},
    {"year": {"gte": 1800, "lt": 1900}},
    {"year": {"gt": 1990}},
    {"year": 1850},
    {"old": True, "kind": {"eq": "song"}},
    {"kind": "river", "year": {"lte": 1750}},
]


@pytest.fixture(scope="module")
def records() -> list[dict[str, Any]]:
    return _records(240, seed=11)


@pytest.fixture(scope="module")
def index(records: list[dict[str, Any]], tmp_path_factory: pytest.TempPathFactory) -> Index:
    out = tmp_path_factory.mktemp("filtered") / "idx"
    return build_index(records, out, vectors={"dim": 8, "epochs": 2, "seed": 1, "threads": 1})


@pytest.mark.parametrize("spec", SPECS)
def test_mask_keeps_exactly_the_matching_articles(
    index: Index, records: list[dict[str, Any]], spec: dict[str, Any]
) -> None:
    expected = [_keeps(r["metadata"], spec) for r in records]
    assert index.filter_mask(spec).tolist() == expected


def _reference_top(index: Index, tokens: list[str], mask: np.ndarray, k: int) -> list[int]:
    """Rows of the k best non-zero BM25 scores among the allowed rows (ties by row)."""
    scores = index.score_tokens(tokens)
    rows = np.flatnonzero(mask & (scores != 0))
    order = np.lexsort((rows, -scores[rows]))
    return rows[order][:k].tolist()


@pytest.mark.parametrize("spec", SPECS)
def test_filtered_bm25_search_equals_an_exhaustive_search_over_the_allowed_articles(
    index: Index, records: list[dict[str, Any]], spec: dict[str, Any]
) -> None:
    mask = index.filter_mask(spec)
    rng = random.Random(3)
    for _ in range(10):
        tokens = index.analyzer.tokens(" ".join(rng.sample(WORDS, 4)))
        for k in (3, 20, 1000):  # 1000: more than any filter keeps
            hits = index.search_tokens(tokens, k, allowed=mask)
            assert [h.row for h in hits] == _reference_top(index, tokens, mask, k)
            # Never a filtered-out article, never zero-score padding, ranks 1..n.
            assert all(mask[h.row] and h.score > 0 for h in hits)
            assert [h.rank for h in hits] == list(range(1, len(hits) + 1))
            assert all(_keeps(records[h.row]["metadata"], spec) for h in hits)
            full = index.score_tokens(tokens)
            assert [h.score for h in hits] == [float(full[h.row]) for h in hits]


def test_a_mask_keeping_everything_gives_the_unfiltered_results(index: Index) -> None:
    everything = np.ones(index.n_docs, dtype=bool)
    pairs = zip(WORDS, WORDS[7:], strict=False)
    token_lists = [index.analyzer.tokens(f"{a} {b}") for a, b in pairs]
    plain = index.search_token_lists(token_lists, 15)
    assert index.search_token_lists(token_lists, 15, allowed=everything) == plain


def test_k_above_the_matches_returns_fewer_candidates(index: Index) -> None:
    spec = {"kind": "town", "year": {"gte": 1960}}
    mask = index.filter_mask(spec)
    assert 0 < mask.sum() < 20
    tokens = index.analyzer.tokens(" ".join(WORDS))  # every word: every article scores
    hits = index.search_tokens(tokens, 50, allowed=mask)
    assert sorted(h.row for h in hits) == np.flatnonzero(mask).tolist()


@pytest.mark.parametrize("exact", [True, False])
def test_filtered_dense_search_equals_brute_force_over_the_allowed_rows(
    records: list[dict[str, Any]], tmp_path: Path, exact: bool
) -> None:
    # exact=False: an index with an HNSW graph (ann_min_articles below its size); the
    # filtered search still equals the brute force over the allowed rows.
    opts = {"dim": 8, "epochs": 2, "seed": 1, "threads": 1}
    if not exact:
        opts["ann_min_articles"] = 50
    idx = build_index(records, tmp_path / "d", vectors=opts)
    assert idx.dense is not None and idx.dense.approximate is (not exact)
    docvec = np.asarray(idx.dense.vectors.docvec)
    rng = random.Random(5)
    for spec in SPECS[:5]:
        mask = idx.filter_mask(spec)
        for _ in range(5):
            tids, qtf = idx.term_ids(idx.analyzer.tokens(" ".join(rng.sample(WORDS, 3))))
            qv = idx.dense.vectors.query_vector(tids, qtf)
            assert qv is not None
            ((rows, scores),) = idx.dense.search([qv], 12, allowed=mask)
            allowed = np.flatnonzero(mask & np.any(docvec != 0, axis=1))
            ref = dot(docvec[allowed], qv)
            order = np.lexsort((allowed, -ref))[:12]
            assert rows.tolist() == allowed[order].tolist()
            assert np.allclose(scores, ref[order])


@pytest.mark.parametrize(
    ("spec", "field", "words"),
    [
        ({"colour": "red"}, "colour", "no article has this metadata field"),
        ({"kind": 3}, "kind", "needs a string"),
        ({"year": "1800"}, "year", "needs a number"),
        ({"year": {"gte": True}}, "year", "needs a number"),
        ({"year": {"lt": 10**400}}, "year", "needs a number"),
        ({"year": float("nan")}, "year", "needs a number"),
        ({"old": 1}, "old", "needs true or false"),
        ({"kind": {"gt": "a"}}, "kind", "compares numbers"),
        ({"kind": {"like": "t%"}}, "kind", "unknown operator"),
        ({"kind": ["town"]}, "kind", '{"in": [...]}'),
        ({"kind": {"in": "town"}}, "kind", "needs a list"),
        ({"kind": {}}, "kind", "empty condition"),
        ({"tags": "a"}, "tags", "several types"),
    ],
)
def test_bad_filters_name_the_field(
    index: Index, spec: dict[str, Any], field: str, words: str
) -> None:
    with pytest.raises(FilterError, match=f"filter field '{field}'") as info:
        index.filter_mask(spec)
    assert info.value.field == field and words in str(info.value)


def test_updates_keep_the_columns_in_step(records: list[dict[str, Any]], tmp_path: Path) -> None:
    folder = tmp_path / "u"
    build_index(records[:30], folder, vectors=False)
    new = {"id": "n1", "title": "New", "text": "w1a w2b", "metadata": {"kind": "lake"}}
    idx = update_index(folder, add=[new], remove=["d0", "d1"])
    kept = [r for r in records[:30] if r["id"] not in ("d0", "d1")] + [new]
    for spec in ({"kind": "lake"}, {"kind": "town"}, {"year": {"gte": 1900}}):
        assert idx.filter_mask(spec).tolist() == [_keeps(r["metadata"], spec) for r in kept]


def test_an_index_built_before_the_columns_asks_for_a_rebuild(
    records: list[dict[str, Any]], tmp_path: Path
) -> None:
    folder = tmp_path / "old"
    build_index(records[:10], folder, vectors=False)
    (folder / FIELDS_FILE).unlink()
    idx = load_index(folder)
    assert [h.doc_id for h in idx.search("w1a", 3)]  # searching without a filter still works
    with pytest.raises(IndexFormatError, match="rebuild"):
        idx.filter_mask({"kind": "town"})


def test_the_fields_file_is_plain_json(index: Index) -> None:
    data = json.loads((index.path / FIELDS_FILE).read_text(encoding="utf-8"))
    kinds = {f["name"]: f["kind"] for f in data["fields"]}
    assert kinds == {"kind": "string", "old": "bool", "year": "number", "tags": "mixed"}
