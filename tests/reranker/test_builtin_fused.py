"""The fused path of reranker/builtin.py: all built-in features at once, equal to the functions.

The functions are the definitions (hand-checked in test_builtin.py); serving computes the same
columns together in `fused_builtins`. These tests compare the two on real candidate sets of
the demo corpus and on edge cases, and check that per-row name analysis is lazy.
"""

from __future__ import annotations

import dataclasses
import gc
import json
import os
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from reranker import CandidateSet, default_registry
from reranker import builtin as B
from reranker import features as F
from reranker.examples import candidate_set
from retriever import Index, load_index
from tests.reranker.test_builtin import CLUE, make_set


def by_function(cs: CandidateSet) -> np.ndarray:
    """The FUSED_NAMES columns from each feature's own function, on a fresh copy of `cs`."""
    fresh = dataclasses.replace(cs, memo={})  # nothing computed by the fused path is shared
    return np.column_stack([getattr(B, name)(fresh) for name in B.FUSED_NAMES])


def assert_fused_equals_functions(cs: CandidateSet) -> None:
    """Fused matrix == per-function columns, to float rounding."""
    fused = B.fused_builtins(cs)
    assert fused.shape == (len(cs), len(B.FUSED_NAMES))
    assert fused.dtype == np.float64 and fused.flags.c_contiguous
    np.testing.assert_allclose(fused, by_function(cs), rtol=1e-12, atol=1e-12)


def test_fused_names_are_builtins_once_each() -> None:
    reg = default_registry()
    assert set(B.FUSED_NAMES) <= set(reg.names)
    assert len(set(B.FUSED_NAMES)) == len(B.FUSED_NAMES)


def test_fused_equals_the_functions_on_demo_candidate_sets(
    demo_index: Index, demo_dir: Path
) -> None:
    lines = (demo_dir / "questions_test.jsonl").read_text(encoding="utf-8").splitlines()
    reg = default_registry()
    checked = 0
    for line in lines[:120]:
        words = json.loads(line)["clue"].split()
        for m in sorted({len(words) // 4, len(words) // 2, len(words)} - {0}):
            prefix = " ".join(words[:m])
            hits = demo_index.search(prefix, k=20)
            if not hits:
                continue
            cs = candidate_set(demo_index, prefix, hits)
            assert_fused_equals_functions(cs)
            # the registry takes the fused path for the built-ins and gives the same matrix
            np.testing.assert_array_equal(reg.matrix(cs, reg.names), B.fused_builtins(cs))
            checked += 1
    assert checked > 250


@pytest.mark.parametrize(
    ("clue", "ids", "scores"),
    [
        (CLUE, ["a3"], [3.0]),  # one candidate, no qualifier, two aliases
        (CLUE, ["a1", "a2", "a3"], [2.0, 2.0, 2.0]),  # all tied
        (CLUE, ["a4", "a1", "a2", "a5"], [1.0, 3.0, 3.0, 0.5]),  # tie for the lead, not first
        (CLUE, ["a2", "a4"], [0.0, 0.0]),  # zero scores, no aliases
        (CLUE, ["a5", "a1", "a3", "a2"], [1.0, 5.0, 2.0, 4.5]),  # not in score order
        (CLUE, ["a1", "a1"], [2.0, 1.0]),  # the same row twice
        ("zzz qqq", ["a1", "a2"], [1.0, 0.5]),  # no clue word in the index
        ("", ["a1", "a2"], [1.0, 0.5]),  # no words at all
        ("old ostrel grey pella hill drum stone", ["a1", "a3", "a5"], [3.0, 2.0, 1.0]),  # names
    ],
)
def test_fused_equals_the_functions_on_edge_cases(
    tiny_index: Index, clue: str, ids: list[str], scores: list[float]
) -> None:
    assert_fused_equals_functions(make_set(tiny_index, clue, ids, np.array(scores)))


def test_compiled_features_are_built_where_required() -> None:
    # .ci/run sets HUNCHWISE_REQUIRE_KERNEL=1: there the compiled path must be the one tested.
    if os.environ.get("HUNCHWISE_REQUIRE_KERNEL") == "1":
        assert B._fused is not None, "reranker._fused did not build (is a C compiler installed?)"


@pytest.mark.skipif(B._fused is None, reason="reranker._fused is not built")
@settings(max_examples=300, deadline=None)
@given(
    scores=st.lists(
        st.one_of(st.sampled_from([0.0, 1.0, 2.5, -1.0]), st.floats(-50, 50, allow_nan=False)),
        min_size=1,
        max_size=40,
    ),
    words=st.integers(0, 200),
)
def test_compiled_within_clue_equals_its_python_twin(scores: list[float], words: int) -> None:
    # Ties, zeros, negative and single scores included; ranks as the retriever gives them.
    s = np.array(scores)
    ranks = np.arange(1.0, s.size + 1)
    mean = float(np.add.reduce(s)) / s.size
    compiled, python = np.empty((13, s.size)), np.empty((13, s.size))
    B._fused.within_clue(s, ranks, mean, words, compiled)
    B.within_clue(s.tolist(), ranks.tolist(), mean, words, python)
    np.testing.assert_allclose(compiled, python, rtol=1e-12, atol=1e-12)


@pytest.mark.skipif(B._fused is None, reason="reranker._fused is not built")
def test_compiled_within_clue_rejects_bad_arrays() -> None:
    s, r = np.array([1.0, 2.0]), np.array([1.0, 2.0])
    with pytest.raises(ValueError, match="13n out"):
        B._fused.within_clue(s, r, 1.5, 3, np.empty((12, 2)))
    with pytest.raises(TypeError, match="float64"):
        B._fused.within_clue(s.astype(np.float32), r, 1.5, 3, np.empty((13, 2)))


def test_fused_equals_the_functions_without_the_compiled_part(
    tiny_index: Index, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The plain-Python twin, as on a machine where reranker._fused did not build.
    monkeypatch.setattr(B, "_fused", None)
    for ids, scores in ((["a3"], [3.0]), (["a4", "a1", "a2", "a5"], [1.0, 3.0, 3.0, 0.5])):
        assert_fused_equals_functions(make_set(tiny_index, CLUE, ids, np.array(scores)))


def test_no_candidates(tiny_index: Index) -> None:
    empty = make_set(tiny_index, CLUE, [], np.array([]))
    assert B.fused_builtins(empty).shape == (0, len(B.FUSED_NAMES))


def _fresh(demo_dir: Path) -> Index:
    """A new Index object on the demo index folder, so its caches start empty."""
    return load_index(demo_dir / "index")


@pytest.mark.usefixtures("demo_index")
def test_names_are_analyzed_only_for_the_rows_asked_for(demo_dir: Path) -> None:
    index = _fresh(demo_dir)
    clue = "This river town is known for its stone bridges"
    hits = index.search(clue, k=7)
    rows = sorted({h.row for h in hits})
    default_registry().matrix(candidate_set(index, clue, hits), default_registry().names)
    cache = F.index_cache(index)
    assert [r for r, e in enumerate(cache["row_names"]) if e is not None] == rows
    assert np.flatnonzero(cache["row_values"][:, -1]).tolist() == rows
    # Reference: the analyzer applied to the stored names of each row, one by one.
    analyze = index.analyzer.tokens
    for e, r in zip(F.row_names(index, rows), rows, strict=True):
        assert e.qualifier == index.qualifiers[r]
        assert set(e.base) == set(analyze(index.bases[r]))
        assert set(e.qualifier_tokens) == set(analyze(index.qualifiers[r]))
        assert set(e.aliases) == set(analyze(" ".join(index.aliases[r])))
        assert e.qualifier_count == sum(q == e.qualifier for q in index.qualifiers) * bool(
            e.qualifier
        )


@pytest.mark.usefixtures("demo_index")
def test_index_cache_goes_with_its_index(demo_dir: Path) -> None:
    index = _fresh(demo_dir)
    key = id(index)
    clue = "This river town is known for its stone bridges"
    default_registry().matrix(candidate_set(index, clue, index.search(clue)), B.FUSED_NAMES)
    assert {"row_names", "row_values", "body_terms"} <= set(F._CACHES[key])
    del index  # nothing cached may keep the index alive
    gc.collect()
    assert key not in F._CACHES
