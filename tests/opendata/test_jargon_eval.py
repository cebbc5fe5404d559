"""Real data: Jargon File clues answered by FOLDOC entries, with BM25, vectors and the hybrid.

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
@pytest.mark.timeout(7200)  # three models, four trainings of 40-epoch vectors: ~30 min on 2 cores
def test_the_build_vectors_find_answers_and_the_reranked_hybrid_keeps_the_recall(
    tmp_path: Path,
) -> None:
    require_jargon()
    # Open data (Debian's dict-foldoc articles, dict-jargon clues): the reranker trained on
    # the 196 training clues with BM25's candidates (`--candidates bm25`), with hybrid ones
    # on the index's own vectors (`--no-refine-vectors`) and with the defaults (vectors
    # refined on those clues), each scored on the 190 test clues with only what it stored.
    result = run(tmp_path)
    print(result)
    before, table = result["retrieval"], result["table"]
    # The build's epochs follow the corpus's size: 40 for FOLDOC's 495,000 words.
    assert result["epochs"] == 40
    for share in ("100%", "50%"):
        for kind in ("corpus", "refined"):
            alone = before[f"vectors alone ({kind} vectors)"][share]
            # Measured with 40 epochs: recall@100 0.532 / 0.511 (corpus, 100% / 50%) and
            # 0.526 / 0.474 (refined), top-1 0.163 to 0.226; the old 5 build epochs gave
            # 0.353 / 0.368 and 0.095 / 0.079. Margins for threads and seeds.
            assert alone["r100"] >= 0.42, (kind, share)
            assert alone["top1"] >= 0.12, (kind, share)
    bm25 = table.pop("BM25 + reranker")["100%"]
    hybrid = next(v for n, v in table.items() if "refined" in n)["100%"]
    # The weight is chosen on whole training clues and BM25's order kept unless another
    # weight also gains out of sample; here it keeps 1.0 (measured 0.616 against 0.616; the
    # prefix-chosen 0.7 gave 0.605), so the default hybrid's recall@20 is BM25's.
    assert hybrid["r20"] >= bm25["r20"] - 0.006
