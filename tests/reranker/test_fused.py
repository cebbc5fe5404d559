"""reranker/fused.py: all built-in features at once, equal to the functions.

The functions are the definitions (hand-checked in test_builtin.py); serving computes the same
columns together in `builtin.fused_builtins`: by the compiled pass (reranker/_fused.c) where it
is built, else by calling the functions. These tests compare the compiled pass with the
functions on real candidate sets of the demo corpus, edge cases and random sets, and check
that the per-row tables are filled lazily.
"""

from __future__ import annotations

import dataclasses
import gc
import json
import os
import sys
import types
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from reranker import CandidateSet, default_registry
from reranker.features import builtin as B
from reranker.features import candidate_set
from reranker.features import fused as FU
from reranker.features import names as F
from reranker.features import rowtables as RT
from retriever import Index, load_index
from tests.reranker.test_builtin import CLUE, make_set


def by_function(cs: CandidateSet) -> np.ndarray:
    """The FUSED_NAMES columns from each feature's own function, on a fresh copy of `cs`."""
    fresh = dataclasses.replace(cs, memo={})  # nothing computed by the fused path is shared
    return np.column_stack([getattr(B, name)(fresh) for name in FU.FUSED_NAMES])


def assert_fused_equals_functions(cs: CandidateSet) -> None:
    """Fused matrix (compiled where built) == per-function columns, to float rounding (sums
    may be added in another order)."""
    fused = B.fused_builtins(cs)
    assert fused.shape == (len(cs), len(FU.FUSED_NAMES))
    assert fused.dtype == np.float64 and fused.flags.c_contiguous
    expected = by_function(cs)
    np.testing.assert_allclose(fused, expected, rtol=1e-12, atol=1e-12)


def test_fused_names_are_builtins_once_each() -> None:
    reg = default_registry()
    assert set(FU.FUSED_NAMES) <= set(reg.names)
    assert len(set(FU.FUSED_NAMES)) == len(FU.FUSED_NAMES)


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
            # the registry takes the fused path for the fused built-ins and gives the same
            # matrix (the dense group is plain numpy, outside the fused pass)
            fused = list(FU.FUSED_NAMES)
            np.testing.assert_array_equal(reg.matrix(cs, fused), B.fused_builtins(cs))
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
        ("old ostrel grey pellomir hill drum stone", ["a1", "a3", "a5"], [3.0, 2.0, 1.0]),  # names
    ],
)
def test_fused_equals_the_functions_on_edge_cases(
    tiny_index: Index, clue: str, ids: list[str], scores: list[float]
) -> None:
    assert_fused_equals_functions(make_set(tiny_index, clue, ids, np.array(scores)))


def test_compiled_features_are_built_where_required() -> None:
    # .ci/run sets HUNCHWISE_REQUIRE_KERNEL=1: there the compiled path must be the one tested.
    if os.environ.get("HUNCHWISE_REQUIRE_KERNEL") == "1":
        assert FU._fused is not None, "reranker._fused did not build (is a C compiler installed?)"


needs_compiled = pytest.mark.skipif(FU._fused is None, reason="reranker._fused is not built")


@needs_compiled
def test_compiled_columns_are_the_fused_names() -> None:
    assert FU._fused.COLUMNS == FU.FUSED_NAMES
    assert FU._fused.ROW_VALUES == RT.ROW_VALUES
    assert FU._fused.SPANS == RT.SPANS


@needs_compiled
@pytest.mark.parametrize("what", ["COLUMNS", "ROW_VALUES", "SPANS"])
def test_a_build_with_another_layout_is_refused(what: str) -> None:
    # A build from another version of the lists (two columns swapped, or one added) must not
    # be used: it would put values under the wrong names.
    built = {k: getattr(FU._fused, k) for k in ("COLUMNS", "ROW_VALUES", "SPANS")}
    FU.check_layout(types.SimpleNamespace(**built))  # the real build passes
    swapped = list(built[what])
    swapped[1], swapped[2] = swapped[2], swapped[1]
    with pytest.raises(ImportError, match=rf"other {what} .*position 1.*pip install -e"):
        FU.check_layout(types.SimpleNamespace(**{**built, what: tuple(swapped)}))
    with pytest.raises(ImportError, match=rf"other {what} .*position {len(swapped)}"):
        FU.check_layout(types.SimpleNamespace(**{**built, what: (*built[what], "extra")}))


@needs_compiled
@settings(max_examples=300, deadline=None)
@given(
    scores=st.lists(
        # No subnormal scores: no retrieval score is that small, and a subnormal top score
        # makes the ratio to it overflow to -inf in both implementations alike.
        st.one_of(
            st.sampled_from([0.0, 1.0, 2.5, -1.0]),
            st.floats(-50, 50, allow_nan=False, allow_subnormal=False),
        ),
        min_size=1,
        max_size=40,
    ),
    words=st.integers(0, 200),
    picks=st.lists(st.integers(0, 4), min_size=40, max_size=40),
    clue=st.lists(
        st.sampled_from(["ostrel", "stone", "river", "town", "old", "pellomir", "zzz", "the"]),
        max_size=8,
    ),
)
def test_compiled_equals_the_functions_on_random_sets(
    tiny_index: Index, scores: list[float], words: int, picks: list[int], clue: list[str]
) -> None:
    # Ties, zeros, negative and single scores, repeated rows and clue words, ranks as the
    # retriever gives them; the five articles' names and texts give every name case.
    n = len(scores)
    cs = CandidateSet(
        index=tiny_index,
        clue=" ".join(clue),
        words=["w"] * words,
        tokens=clue,
        rows=np.array(picks[:n], dtype=np.int64),
        scores=np.array(scores),
        ranks=np.arange(1, n + 1, dtype=np.int64),
    )
    np.testing.assert_allclose(FU.compiled(cs), by_function(cs), rtol=1e-12, atol=1e-12)


@needs_compiled
def test_compiled_rejects_bad_input(tiny_index: Index) -> None:
    cs = make_set(tiny_index, CLUE, ["a1", "a2"], np.array([2.0, 1.0]))
    FU.compiled(cs)  # fills the tables of both rows
    names, values = RT.name_table(tiny_index), RT.values_table(tiny_index)
    indptr, terms = tiny_index.article_term_lists()

    def call(**change: object) -> object:
        args: dict[str, object] = {
            "out": np.empty((2, len(FU.FUSED_NAMES))),
            "scores": cs.scores,
            "ranks": cs.ranks,
            "rows": cs.rows,
            "words": 3,
            "table": values,
            "spans": names.spans,
            "arena": names.arena,
            "clue_names": [0, 1],
            "indptr": indptr,
            "terms": terms,
            "clue_terms": [(0, 1.5)],
        }
        args.update(change)
        return FU._fused.candidates(*args.values())

    assert call() is True
    with pytest.raises(ValueError, match="n x COLUMNS out"):
        call(out=np.empty((2, 3)))
    with pytest.raises(TypeError, match="float64"):
        call(scores=cs.scores.astype(np.float32))
    with pytest.raises(ValueError, match="row 9 outside"):
        call(rows=np.array([0, 9]))
    with pytest.raises(ValueError, match="do not match"):
        call(table=values[:3])
    damaged = names.spans.copy()
    damaged[cs.rows[1], 1] = 10**6  # a span past the end of the arena
    with pytest.raises(ValueError, match="damaged"):
        call(spans=damaged)
    with pytest.raises(TypeError, match="pairs"):
        call(clue_terms=[0, 1])
    unseen = np.zeros_like(values)
    assert call(table=unseen) is False  # not in the tables yet: the caller fills and retries


def test_name_table_survives_growing(tiny_index: Index) -> None:
    # Rows are added in several batches, and the arena grows past its first size in between;
    # every row's ids still give back its own name tokens.
    table = RT.NameTable(len(tiny_index))
    table.arena = np.zeros(2, dtype=np.int32)  # force growth on the first fill
    for rows in ([3], [0, 3], [4, 1, 2]):
        with table.lock:
            table.fill(tiny_index, np.array(rows))
    token_of = {i: t for t, i in table.ids.items()}
    for row, e in enumerate(F.row_names(tiny_index, range(len(tiny_index)))):
        ready, start, nb, nq, na = table.spans[row].tolist()
        ids = table.arena[start : start + nb + nq + na].tolist()
        assert ready == 1
        assert [token_of[i] for i in ids] == [*e.base, *e.qualifier_tokens, *e.aliases]


def test_fused_equals_the_functions_without_the_compiled_part(
    tiny_index: Index, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The functions themselves, as on a machine where reranker._fused did not build.
    monkeypatch.setattr(FU, "_fused", None)
    for ids, scores in ((["a3"], [3.0]), (["a4", "a1", "a2", "a5"], [1.0, 3.0, 3.0, 0.5])):
        assert_fused_equals_functions(make_set(tiny_index, CLUE, ids, np.array(scores)))


def test_no_candidates(tiny_index: Index) -> None:
    empty = make_set(tiny_index, CLUE, [], np.array([]))
    assert B.fused_builtins(empty).shape == (0, len(FU.FUSED_NAMES))


def _fresh(demo_dir: Path) -> Index:
    """A new Index object on the demo index folder, so its caches start empty."""
    return load_index(demo_dir / "index")


@pytest.mark.usefixtures("demo_index")
@pytest.mark.parametrize("compiled", [True, False])
def test_names_are_analyzed_only_for_the_rows_asked_for(
    demo_dir: Path, compiled: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    if compiled and FU._fused is None:
        pytest.skip("reranker._fused is not built")
    if not compiled:
        monkeypatch.setattr(FU, "_fused", None)
    index = _fresh(demo_dir)
    clue = "This river town is known for its stone bridges"
    hits = index.search(clue, k=7)
    rows = sorted({h.row for h in hits})
    default_registry().matrix(candidate_set(index, clue, hits), default_registry().names)
    cache = F.index_cache(index)
    if compiled:  # the tables, not the strings, and only these rows
        assert np.flatnonzero(cache["row_values"][:, -1]).tolist() == rows
        assert "row_names" not in cache
        spans = RT.name_table(index).spans
        assert np.flatnonzero(spans[:, 0]).tolist() == rows
    else:  # the functions read the index directly: no tables, the names of these rows
        assert "row_values" not in cache and "name_table" not in cache
        assert [r for r, e in enumerate(cache["row_names"]) if e is not None] == rows
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
    if compiled:  # the name table holds the same tokens, as ids
        table = RT.name_table(index)
        token_of = {i: t for t, i in table.ids.items()}
        for e, r in zip(F.row_names(index, rows), rows, strict=True):
            _, start, nb, nq, na = table.spans[r].tolist()
            ids = table.arena[start : start + nb + nq + na].tolist()
            assert [token_of[i] for i in ids] == [*e.base, *e.qualifier_tokens, *e.aliases]


@pytest.mark.usefixtures("demo_index")
def test_index_cache_goes_with_its_index(demo_dir: Path) -> None:
    index = _fresh(demo_dir)
    key = id(index)
    clue = "This river town is known for its stone bridges"
    default_registry().matrix(candidate_set(index, clue, index.search(clue)), FU.FUSED_NAMES)
    tables = {"row_values", "name_table"} if FU._fused is not None else set()
    assert {"body_terms", *tables} <= set(F._CACHES[key])
    del index  # nothing cached may keep the index alive
    gc.collect()
    assert key not in F._CACHES


@pytest.mark.usefixtures("demo_index")
def test_threads_filling_the_tables_at_once_get_the_same_features(demo_dir: Path) -> None:
    # Four threads, switching every few microseconds, featurize candidate sets of a fresh
    # index at once, so rows are added to the tables (and the arena grows) while others read.
    lines = (demo_dir / "questions_test.jsonl").read_text(encoding="utf-8").splitlines()
    clues = [json.loads(line)["clue"] for line in lines[:80]]
    reference = _fresh(demo_dir)
    expected = [B.fused_builtins(candidate_set(reference, c, reference.search(c))) for c in clues]
    index = _fresh(demo_dir)
    sets = [candidate_set(index, c, index.search(c)) for c in clues]
    old = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)
    try:
        with ThreadPoolExecutor(4) as pool:
            got = list(pool.map(B.fused_builtins, sets))
    finally:
        sys.setswitchinterval(old)
    for g, e in zip(got, expected, strict=True):
        np.testing.assert_array_equal(g, e)
