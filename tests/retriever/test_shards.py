"""A sharded build searches exactly like one index: statistics, weights, hits, in-links.

Every sharded build here runs its tasks on a local Ray cluster (two CPUs, one per module),
except the in-process checks at the end, which need no Ray. The reference is always a single
build of the same corpus (retriever/build.py), the code whose results sharding must keep.
"""

from __future__ import annotations

import itertools
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.sparse as sp

from retriever import BM25Params, CorpusError, IndexFormatError, build_index, load_index
from retriever.index import Index
from retriever.postings import FieldCounts
from retriever.shardcount import count_shard, join_keys, reduce_stats, resolve_links, split_items
from retriever.sharded import ShardedIndex
from retriever.shards import build_sharded, read_stats, shard_entry, write_shard, write_stats

from .helpers import DEMO, UNEVEN, write_jsonl

pytestmark = pytest.mark.slow


@dataclass
class Pair:
    """A corpus built as one index and as shards."""

    corpus: Path
    single: Index
    sharded: ShardedIndex


def _build_pair(tmp: Path, corpus: Path, spans: list[tuple[int, int]], params: BM25Params) -> Pair:
    single = build_index(corpus, tmp / "single", params=params, vectors=False)
    out = build_sharded(
        corpus, tmp / "sharded", spans=spans, params=params, ray_address="local", vectors=False
    )
    sharded = load_index(out, sharded=True)
    assert isinstance(sharded, ShardedIndex)
    return Pair(corpus, single, sharded)


@pytest.fixture(scope="module")
def demo(ray_cluster: None, tmp_path_factory: pytest.TempPathFactory) -> Pair:
    tmp = tmp_path_factory.mktemp("demo")
    return _build_pair(tmp, DEMO / "articles.jsonl", UNEVEN, BM25Params(title_weight=0.5))


def _skewed_records() -> list[dict[str, Any]]:
    """Invented articles whose shard-local statistics differ from the corpus's.

    Shard 0 (rows 0-9): 'ember' in every article, so its local df exceeds half the shard
    (local okapi IDF negative, floored) while it is rare over the corpus. Shard 1 (rows
    10-29): long texts (a very different local mean length). Shard 2 (rows 30-35): 'zephyrine'
    only here; links to titles and aliases of the other shards; twin texts of shard-0
    articles, so some scores tie across shards.
    """
    recs: list[dict[str, Any]] = []
    for i in range(10):
        recs.append(
            {
                "id": f"s0-{i}",
                "title": f"Ember hall {i}",
                "text": f"ember hearth stone {'lantern ' * (i % 3)}keeper number{i}",
                "aliases": [f"hall alias {i}"],
            }
        )
    for i in range(20):
        filler = " ".join(f"word{j}" for j in range(i, i + 40))
        recs.append(
            {
                "id": f"s1-{i}",
                "title": f"Long record {i}",
                "text": f"{filler} hearth lantern river{i % 4}",
                "aliases": ["shared alias"] if i < 2 else [f"record alias {i}"],
                "links": ["Ember hall 0"] if i % 5 == 0 else [],
            }
        )
    for i in range(6):
        recs.append(
            {
                "id": f"s2-{i}",
                "title": f"Zephyrine place {i}",
                "text": f"zephyrine ember hearth stone keeper number{i}"
                if i < 3
                else f"ember hearth stone {'lantern ' * (i % 3)}keeper number{i}",
                "links": [
                    "Ember hall 1",
                    "hall alias 2",
                    "record alias 7",
                    "shared alias",
                    "Nowhere",
                ],
            }
        )
    return recs


SKEWED_SPANS = [(0, 10), (10, 30), (30, 36)]
SKEWED_QUERIES = [
    "ember",
    "zephyrine",
    "ember hearth",
    "zephyrine ember keeper",
    "lantern keeper stone",
    "hearth",
    "word5 word30 hearth",
    "river1 lantern",
    "number1",
    "ember hall",
    "long record river2",
]


@pytest.fixture(scope="module")
def skewed(ray_cluster: None, tmp_path_factory: pytest.TempPathFactory) -> Pair:
    tmp = tmp_path_factory.mktemp("skewed")
    corpus = write_jsonl(tmp / "skewed.jsonl", _skewed_records())
    return _build_pair(tmp, corpus, SKEWED_SPANS, BM25Params(title_weight=1.0))


# -- what is compared ------------------------------------------------------------------


def _field_tf(index: Index, prefix: str) -> sp.csc_matrix:
    fld = index.body if prefix == "body" else index.title_field
    counts = np.load(index.path / f"{prefix}_tf.npy")
    return sp.csc_matrix(
        (counts, np.asarray(fld.docs), np.asarray(fld.indptr)), shape=(index.n_docs, index.n_terms)
    )


def _postings(index: Index, first_row: int) -> dict[str, np.ndarray]:
    """(term, global row, weight bits) of every posting of both fields, sorted."""
    out = {}
    for prefix, fld in (("body", index.body), ("title", index.title_field)):
        terms = np.repeat(np.arange(index.n_terms), np.diff(fld.indptr))
        rows = np.asarray(fld.docs, dtype=np.int64) + first_row
        order = np.lexsort((rows, terms))
        out[prefix] = np.stack(
            [
                terms[order],
                rows[order],
                np.asarray(fld.weight).view(f"u{fld.weight.itemsize}")[order],
            ]
        )
    return out


def weight_mismatches(single: Index, shards: list[Index], firsts: list[int]) -> list[str]:
    """Where the shards' vocabularies, weight types or posting weights differ from one index."""
    problems = []
    want = _postings(single, 0)
    parts = [_postings(s, f) for s, f in zip(shards, firsts, strict=True)]
    for s in shards:
        if s.vocab.terms.tolist() != single.vocab.terms.tolist():
            problems.append(f"{s.path.name}: vocabulary")
        if s.body.weight.dtype != single.body.weight.dtype:
            problems.append(f"{s.path.name}: weight type {s.body.weight.dtype}")
    for prefix in ("body", "title"):
        got = np.concatenate([p[prefix] for p in parts], axis=1)
        got = got[:, np.lexsort((got[1], got[0]))]
        if got.shape != want[prefix].shape or not np.array_equal(got, want[prefix]):
            problems.append(f"{prefix} posting weights")
    return problems


def stats_mismatches(single: Index, shards: list[Index]) -> list[str]:
    """Where the statistics a shard weighs with (N, df, mean length, IDF) differ."""
    problems = []
    for s in shards:
        info = s.manifest["shard"]
        stats = read_stats(s.path.parent / "corpus_stats", info["stats_sha256"])
        for prefix, fs in (("body", stats.body), ("title", stats.title)):
            whole = FieldCounts(_field_tf(single, prefix), single.params)
            part = FieldCounts(_field_tf(s, prefix), s.params, fs)
            if fs.n_docs != single.n_docs:
                problems.append(f"{s.path.name}: N")
            if not np.array_equal(fs.df, whole.df):
                problems.append(f"{s.path.name}: {prefix} df")
            if part.avgdl != whole.avgdl:
                problems.append(f"{s.path.name}: {prefix} mean length")
            if not np.array_equal(part.idf, whole.idf):
                problems.append(f"{s.path.name}: {prefix} IDF")
    return problems


def _hits(found: list[Any]) -> list[tuple[str, float, int, int]]:
    return [(h.doc_id, h.score, h.rank, h.row) for h in found]


def _shards_of(pair: Pair) -> tuple[list[Index], list[int]]:
    shards = [s for s in pair.sharded.shards if isinstance(s, Index)]
    return shards, pair.sharded.first_rows


# -- the demo corpus -------------------------------------------------------------------


def test_demo_statistics_and_weights_equal(demo: Pair) -> None:
    shards, firsts = _shards_of(demo)
    assert [s.n_docs for s in shards] == [b - a for a, b in UNEVEN]
    assert stats_mismatches(demo.single, shards) == []
    assert weight_mismatches(demo.single, shards, firsts) == []


def test_demo_searches_equal_ties_included(demo: Pair) -> None:
    lines = (DEMO / "questions_test.jsonl").read_text(encoding="utf-8").splitlines()
    clues = [json.loads(line)["clue"] for line in lines[:150]]
    # Whole clues and their first few words (short prefixes tie more often).
    clues += [" ".join(c.split()[:4]) for c in clues]
    assert len(clues) == 300
    want = demo.single.search_many(clues, k=20)
    got = demo.sharded.search_many(clues, k=20)
    assert [_hits(g) for g in got] == [_hits(w) for w in want]
    ties = sum(1 for hits in want for a, b in itertools.pairwise(hits) if a.score == b.score)
    assert ties > 0, "no tied scores among these clues: the tie-break was not exercised"


def test_demo_inlinks_equal(demo: Pair) -> None:
    shards, _ = _shards_of(demo)
    got = np.concatenate([np.asarray(s.inlinks) for s in shards])
    assert np.array_equal(got, np.asarray(demo.single.inlinks))
    assert int(got.sum()) > 0


# -- statistics a shard alone would get wrong --------------------------------------------


def test_skewed_statistics_weights_and_searches_equal(skewed: Pair) -> None:
    shards, firsts = _shards_of(skewed)
    assert stats_mismatches(skewed.single, shards) == []
    assert weight_mismatches(skewed.single, shards, firsts) == []
    want = skewed.single.search_many(SKEWED_QUERIES, k=20)
    got = skewed.sharded.search_many(SKEWED_QUERIES, k=20)
    assert [_hits(g) for g in got] == [_hits(w) for w in want]
    # Twins across shards tie: the merged order must keep the lower global row first.
    ember = [h for h in want[SKEWED_QUERIES.index("ember hearth")]]
    assert any(a.score == b.score for a, b in itertools.pairwise(ember))


def test_skewed_inlinks_joined_across_shards(skewed: Pair) -> None:
    shards, _ = _shards_of(skewed)
    got = np.concatenate([np.asarray(s.inlinks) for s in shards])
    assert np.array_equal(got, np.asarray(skewed.single.inlinks))
    # "Ember hall 1" (shard 0) is linked from all six articles of shard 2.
    assert int(got[1]) == 6
    from retriever.store import read_unresolved

    unresolved = [u for s in shards for u in read_unresolved(s.path)]
    assert unresolved == read_unresolved(skewed.single.path)
    assert len(unresolved) == 12  # 'Nowhere' and the ambiguous 'shared alias', six each


def test_shard_local_statistics_are_caught(skewed: Pair, tmp_path: Path) -> None:
    """The mutation: each shard weighted with its own statistics, as if built alone."""
    corpus = str(skewed.corpus)
    an = skewed.single.analyzer.config.to_dict()
    params = skewed.single.params.to_dict()
    settings = {"analyzer": an, "bm25": params, "skip_bad": False, "checksum": "x"}
    shards, firsts, first = [], [], 0
    for i, span in enumerate(SKEWED_SPANS):
        part = count_shard(corpus, span, an, False)
        digest = write_stats(tmp_path / f"stats{i}", reduce_stats([part]))
        known = resolve_links(join_keys(corpus, [part]), [part])[0]
        folder = tmp_path / f"local{i}"
        write_shard(
            corpus,
            span,
            settings,
            str(tmp_path / f"stats{i}"),
            known,
            shard_entry(i, part, first, digest),
            str(folder),
        )
        shards.append(Index(folder))  # alone: load_index refuses a single shard
        firsts.append(first)
        first += len(part.keys)
    problems = stats_mismatches_local(skewed.single, shards, tmp_path)
    assert problems, "shard-local statistics went unnoticed"
    assert weight_mismatches(skewed.single, shards, firsts)
    inlinks = np.concatenate([np.asarray(s.inlinks) for s in shards])
    assert not np.array_equal(inlinks, np.asarray(skewed.single.inlinks))


def stats_mismatches_local(single: Index, shards: list[Index], tmp: Path) -> list[str]:
    problems = []
    for i, s in enumerate(shards):
        stats = read_stats(tmp / f"stats{i}", s.manifest["shard"]["stats_sha256"])
        whole = FieldCounts(_field_tf(single, "body"), single.params)
        part = FieldCounts(_field_tf(s, "body"), s.params, stats.body)
        if part.avgdl != whole.avgdl or stats.body.n_docs != single.n_docs:
            problems.append(f"shard {i}")
    return problems


# -- without Ray, and the folder's own checks ----------------------------------------------


def test_in_process_build_equals_a_single_build(tmp_path: Path) -> None:
    """No Ray: the same functions run in this process, with the same results."""
    corpus = write_jsonl(tmp_path / "skewed.jsonl", _skewed_records())
    params = BM25Params(title_weight=1.0)
    single = build_index(corpus, tmp_path / "single", params=params, vectors=False)
    out = build_sharded(corpus, tmp_path / "here", spans=SKEWED_SPANS, params=params)
    here = load_index(out, sharded=True)
    assert isinstance(here, ShardedIndex)
    shards = [s for s in here.shards if isinstance(s, Index)]
    assert weight_mismatches(single, shards, here.first_rows) == []
    got = [_hits(h) for h in here.search_many(SKEWED_QUERIES, k=5)]
    assert got == [_hits(h) for h in single.search_many(SKEWED_QUERIES, k=5)]


def test_in_process_build_equals_the_ray_build(skewed: Pair, tmp_path: Path) -> None:
    out = build_sharded(
        skewed.corpus, tmp_path / "here", spans=SKEWED_SPANS, params=skewed.single.params
    )
    here = load_index(out, sharded=True)
    assert isinstance(here, ShardedIndex)
    for a, b in zip(here.shards, skewed.sharded.shards, strict=True):
        assert isinstance(a, Index) and isinstance(b, Index)
        for name in ("body_weight", "body_docs", "title_weight", "inlinks", "doc_len"):
            assert (a.path / f"{name}.npy").read_bytes() == (b.path / f"{name}.npy").read_bytes()


def test_sharded_folder_refused_where_a_single_index_is_needed(skewed: Pair) -> None:
    with pytest.raises(IndexFormatError, match="built in 3 shards"):
        load_index(skewed.sharded.path)


def test_one_shard_alone_is_refused(skewed: Pair) -> None:
    # A shard holds part of the corpus: opened alone it would search or serve that part only.
    shard = skewed.sharded.shards[1]
    with pytest.raises(IndexFormatError, match="one shard of the sharded index"):
        load_index(shard.path)
    with pytest.raises(IndexFormatError, match="one shard of the sharded index"):
        load_index(shard.path, sharded=True)


def test_split_items_covers_every_item() -> None:
    assert split_items(10, 3) == [(0, 3), (3, 6), (6, 10)]
    assert split_items(2, 4) == [(0, 1), (1, 2)]


def test_bad_line_in_a_ray_task_is_named_in_one_line(ray_cluster: None, tmp_path: Path) -> None:
    corpus = tmp_path / "bad.jsonl"
    corpus.write_text(
        '{"id":"a","title":"A","text":"alpha"}\n{"id":"b","title":"B"}\n'
        '{"id":"c","title":"C","text":"gamma"}\n',
        encoding="utf-8",
    )
    with pytest.raises(CorpusError) as caught:
        build_sharded(corpus, tmp_path / "idx", shards=2, ray_address="local")
    assert str(caught.value) == f"{corpus}, line 2, field 'text': is required"
    assert not (tmp_path / "idx").exists()


def test_corpus_error_survives_pickling() -> None:
    """How a Ray task's error reaches the driver."""
    import pickle

    err = CorpusError("is required", file="c.jsonl", line=2, field="text")
    back = pickle.loads(pickle.dumps(err))
    assert (str(back), back.file, back.line, back.field) == (str(err), "c.jsonl", 2, "text")
