"""A sharded build's word and article vectors, and its dense and hybrid search, equal one build's.

The builds run their tasks on a local Ray cluster (two CPUs, one per module). The reference is
a single build of the same corpus with the same vector settings (retriever/build.py and
retriever/vectors.py), the code whose results sharding must keep. gensim trains on one
thread, the only setting that gives the very same vectors on every run.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from retriever import BM25Params, build_index, load_index
from retriever.analyzer import Analyzer
from retriever.index import Index
from retriever.ingest import ingest, item_offsets
from retriever.shardcount import _windows, count_shard
from retriever.sharded import ShardedIndex
from retriever.shards import build_sharded

from .helpers import DEMO, N_DEMO, UNEVEN

VECTORS = {"dim": 32, "threads": 1, "epochs": 2}  # small and deterministic

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def pair(ray_cluster: None, tmp_path_factory: pytest.TempPathFactory) -> tuple[Index, ShardedIndex]:
    tmp = tmp_path_factory.mktemp("vec")
    corpus = DEMO / "articles.jsonl"
    params = BM25Params(title_weight=0.5)
    single = build_index(corpus, tmp / "single", params=params, vectors=VECTORS)
    out = build_sharded(
        corpus, tmp / "sharded", spans=UNEVEN, params=params, ray_address="local", vectors=VECTORS
    )
    sharded = load_index(out, sharded=True)
    assert isinstance(sharded, ShardedIndex)
    return single, sharded


def _clues(n: int) -> list[str]:
    lines = (DEMO / "questions_test.jsonl").read_text("utf-8").splitlines()
    return [json.loads(line)["clue"] for line in lines[:n]]


def test_article_vectors_equal_bit_for_bit(pair: tuple[Index, ShardedIndex]) -> None:
    single, sharded = pair
    assert single.dense is not None
    whole = single.dense.vectors
    for shard, first in zip(sharded.shards, sharded.first_rows, strict=True):
        assert isinstance(shard, Index) and shard.dense is not None
        part = shard.dense.vectors
        assert part.words() == whole.words()
        assert np.asarray(part.wordvec).tobytes() == np.asarray(whole.wordvec).tobytes()
        assert np.asarray(part.weight).tobytes() == np.asarray(whole.weight).tobytes()
        want = np.asarray(whole.docvec[first : first + shard.n_docs])
        assert np.asarray(part.docvec).tobytes() == want.tobytes()
        entry = shard.manifest["vectors"]
        assert entry["settings"] == single.manifest["vectors"]["settings"]
        assert entry["words"] == single.manifest["vectors"]["words"]
    assert sharded.manifest["vectors"]["words"] == single.manifest["vectors"]["words"]


def test_dense_and_hybrid_search_equal_the_single_index(pair: tuple[Index, ShardedIndex]) -> None:
    single, sharded = pair
    clues = _clues(120)
    for options in ({}, {"fusion": "rrf", "pool": 30}, {"weight": 0.8, "pool": 7}):
        want = single.search_hybrid_many(clues, 10, **options)  # type: ignore[arg-type]
        got = sharded.search_hybrid_many(clues, 10, **options)  # type: ignore[arg-type]
        assert got == want
    assert sum(r.mode == "hybrid" for r in want) > 100
    # Every shard contributes to the merged lists (the shards are uneven on purpose).
    rows = {h.row for r in got for h in r.hits}
    assert all(
        any(f <= r < f + s.n_docs for r in rows)
        for f, s in zip(sharded.first_rows, sharded.shards, strict=True)
    )


def test_sharded_build_without_vectors_searches_bm25_only(tmp_path: Path) -> None:
    from .helpers import write_jsonl

    corpus = write_jsonl(
        tmp_path / "c.jsonl",
        [{"id": f"d{i}", "title": f"T{i}", "text": f"alpha beta w{i}"} for i in range(6)],
    )
    out = build_sharded(corpus, tmp_path / "s", shards=2, vectors=False)
    sharded = load_index(out, sharded=True)
    assert isinstance(sharded, ShardedIndex) and sharded.dense is None
    result = sharded.search_hybrid("alpha", 3)
    assert result.mode == "bm25" and [h.doc_id for h in result.hits] == ["d0", "d1", "d2"]


def test_each_task_reads_only_its_byte_range(tmp_path: Path) -> None:
    """Overwrite the lines before a shard (same length) once the file is split: the shard
    reads the same articles, so it never read them; skipping from the start finds others."""
    lines = [
        json.dumps({"id": f"d{i}", "title": f"T{i}", "text": f"word{i} common"}) + "\n"
        for i in range(10)
    ]
    corpus = tmp_path / "c.jsonl"
    corpus.write_text("".join(lines[:3]) + "\n" + "".join(lines[3:]), encoding="utf-8")
    offsets = item_offsets(corpus)
    assert offsets is not None
    (window,) = _windows(offsets, [(6, 10)])
    assert window is not None and window[2] == 8  # the blank line counts as a line
    before = corpus.read_bytes()[: window[0]]
    corpus.write_bytes(b"x" * (len(before) - 1) + b"\n" + corpus.read_bytes()[window[0] :])
    an = Analyzer().config.to_dict()
    part = count_shard(str(corpus), (6, 10), an, False, window)
    assert part.keys.ids == ["d6", "d7", "d8", "d9"] and part.keys.lines == [8, 9, 10, 11]
    # Skipping items from the start now finds none (the junk is one item, then d6..d9).
    assert count_shard(str(corpus), (6, 10), an, False).keys.ids == []


def test_byte_windows_give_the_items_a_skip_gives(tmp_path: Path) -> None:
    corpus = DEMO / "articles.jsonl"
    offsets = item_offsets(corpus)
    assert offsets is not None and offsets[0].size == N_DEMO + 1
    an = Analyzer()
    import os

    for span, window in zip(UNEVEN, _windows(offsets, UNEVEN), strict=True):
        got = []
        for w in (window, None):
            from retriever.corpus import ReadReport

            with open(os.devnull, "wb") as sink:
                state = ingest(
                    corpus,
                    an,
                    sink,
                    workers=1,
                    skip_bad=False,
                    report=ReadReport(),
                    bar=type("B", (), {"update": lambda self, n: None})(),
                    items=span,
                    window=w,
                )
            got.append((state.keys.ids, state.keys.lines))
        assert got[0] == got[1] and len(got[0][0]) == span[1] - span[0]
