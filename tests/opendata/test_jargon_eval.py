"""Real data: the hybrid beats BM25 alone on Jargon File clues answered by FOLDOC entries.

Source of the data: the dictd files of Debian's dict-foldoc (the corpus) and dict-jargon
(the clues) packages; see jargon_clues.py for how the set is made.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from ..retriever.foldoc import require_dictionary, require_foldoc
from .evaluate import evaluate, format_table
from .jargon_clues import JARGON_DICT, JARGON_INDEX, mask, shares_run
from .rerank import run


def require_jargon() -> None:
    """Skip when dict-jargon is not installed, unless HUNCHWISE_REQUIRE_FOLDOC=1."""
    require_foldoc()
    require_dictionary((JARGON_DICT, JARGON_INDEX), "dict-jargon")


def test_masking_and_overlap_check() -> None:
    assert mask("A Foo-bar is a foo that bars; FOO.", "foo bar") == "A is a that bars"
    assert shares_run("one two three four five six", "x one two three four five six y")
    assert not shares_run("one two three four five six", "one two three four five seven")


@pytest.mark.slow
def test_vectors_add_answers_to_the_candidate_pool(tmp_path: Path) -> None:
    require_jargon()
    # Smaller vectors than the default keep this test to about a minute on a slow machine.
    result = evaluate(tmp_path, {"dim": 100, "epochs": 5})
    print(format_table(result))
    counts = result["counts"]
    assert counts["test"] >= 100 and counts["train"] >= 100
    table = result["table"]
    for share in ("100%", "50%"):
        bm25 = table["BM25 (k1 1.5, b 0.75)"][share]
        dense = table["vectors alone"][share]
        # Vectors alone find a real share of answers, and BM25's and the vectors' top-100
        # lists together hold clearly more answers than BM25's alone. (On this set the
        # fused top 20 does not beat BM25's top 20 with corpus-only vectors; see the table.)
        assert dense["r100"] > 0.2, share
        assert table["union of both top-100 lists"][share]["r100"] >= bm25["r100"] + 0.03, share


@pytest.mark.slow
@pytest.mark.timeout(3600)  # three models, three trainings of the vectors: ~15 min on 2 cores
def test_refined_vectors_find_more_answers_and_keep_the_reranked_recall(tmp_path: Path) -> None:
    require_jargon()
    # Open data (Debian's dict-foldoc articles, dict-jargon clues): the reranker trained on
    # the 196 training clues with BM25's candidates (`--candidates bm25`), with hybrid ones
    # on the index's own vectors (`--no-refine-vectors`) and with the defaults (vectors
    # refined on those clues), each scored on the 190 test clues with only what it stored.
    result = run(tmp_path)
    print(result)
    before, table = result["retrieval"], result["table"]
    for share in ("100%", "50%"):
        corpus = before["vectors alone (corpus vectors)"][share]
        refined = before["vectors alone (refined vectors)"][share]
        # Measured 0.353 -> 0.500 (100%) and 0.368 -> 0.468 (50%); margin for seeds/threads.
        assert refined["r100"] >= corpus["r100"] + 0.05, share
        assert refined["top1"] > corpus["top1"], share
    bm25 = table.pop("BM25 + reranker")["100%"]
    hybrid = next(v for n, v in table.items() if "refined" in n)["100%"]
    # Measured 0.621 against 0.616: one clue, within noise (see README), so this checks
    # that the hybrid keeps BM25's recall within two clues rather than that it wins.
    assert hybrid["r20"] >= bm25["r20"] - 0.011
