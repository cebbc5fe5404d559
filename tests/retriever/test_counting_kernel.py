"""The compiled texts-to-term-ids loop (retriever/_analysis.c) against its Python definition."""

from __future__ import annotations

import os
import random

import numpy as np
import pytest

from retriever.analyzer import Analyzer
from retriever.counting import _ids_of, count_texts, has_kernel

_CHARS = "abcXYZ019_ é-ﬁ\n\t.,'ΣΑ ſ"


def _require_kernel() -> None:
    # .ci/run sets HUNCHWISE_REQUIRE_KERNEL=1: there the compiled path must be the one tested.
    if not has_kernel():
        if os.environ.get("HUNCHWISE_REQUIRE_KERNEL") == "1":
            pytest.fail("retriever._analysis is not built")
        pytest.skip("retriever._analysis is not built")


def random_texts(seed: int, n: int = 400) -> list[str]:
    """Short texts of letters, digits, underscores, punctuation and some non-ASCII, most of
    them ASCII (the compiled path) and some not (the callback path)."""
    rng = random.Random(seed)
    words = ["the", "And", "of", "runs", "Running", "x", "a1", "__", "ok_go", "Café", "ΣΟΦΙΑ"]
    out = []
    for i in range(n):
        if i % 7 == 0:
            out.append("".join(rng.choice(_CHARS) for _ in range(rng.randrange(40))))
        else:
            picked = [rng.choice(words) + rng.choice(["", " ", ", ", "-", "."]) for _ in range(30)]
            out.append("".join(picked[: rng.randrange(31)]).encode("ascii", "ignore").decode())
    return out


@pytest.mark.parametrize(
    "settings",
    [
        {},
        {"casefold": False},
        {"stemmer": None, "stopwords": "none"},
        {"stopwords": ("runs", "ok_go"), "normalization": "none", "strip_accents": False},
    ],
)
@pytest.mark.parametrize("seed", [1, 2])
def test_same_ids_and_terms_as_the_python_loop(settings: dict[str, object], seed: int) -> None:
    _require_kernel()
    texts = random_texts(seed)
    results = []
    for use_kernel in (True, False):
        an = Analyzer(**settings)  # type: ignore[arg-type]
        table = an.term_table()
        # Two calls: the second starts from a table the first filled.
        first = _ids_of(an, table, texts[:150], use_kernel)
        second = _ids_of(an, table, texts[150:], use_kernel)
        results.append((first, second, list(table.terms), dict(table)))
    (k1, k2, kterms, ktable), (p1, p2, pterms, ptable) = results
    for got, want in ((k1, p1), (k2, p2)):
        np.testing.assert_array_equal(got[0], want[0])
        np.testing.assert_array_equal(got[1], want[1])
    assert kterms == pterms
    assert ktable == ptable


def test_count_texts_matches_the_tokens_of_each_text() -> None:
    """Counts per text equal a Counter over `Analyzer.tokens`, the analyzer's public meaning."""
    _require_kernel()
    from collections import Counter

    an = Analyzer()
    table = an.term_table()
    texts = random_texts(3, 200)
    indptr, cols, counts = count_texts(an, table, texts)
    for i, text in enumerate(texts):
        got = {
            table.terms[c]: int(n)
            for c, n in zip(
                cols[indptr[i] : indptr[i + 1]], counts[indptr[i] : indptr[i + 1]], strict=True
            )
        }
        assert got == dict(Counter(an.tokens(text))), text


def test_a_text_that_is_not_a_string_is_refused() -> None:
    _require_kernel()
    an = Analyzer()
    with pytest.raises(TypeError, match="text 1 is not a str"):
        _ids_of(an, an.term_table(), ["fine", 3])  # type: ignore[list-item]


def _numpy_counts(ids: np.ndarray, lens: np.ndarray) -> tuple[np.ndarray, ...]:
    """count_texts's definition of per-text counts: numpy's unique over (text, term) keys."""
    indptr = np.zeros(lens.size + 1, dtype=np.int64)
    if ids.size == 0:
        return indptr, np.zeros(0, np.int32), np.zeros(0, np.int32)
    rows = np.repeat(np.arange(lens.size, dtype=np.int64), lens)
    width = int(ids.max()) + 1
    keys, counts = np.unique(rows * width + ids, return_counts=True)
    np.cumsum(np.bincount(keys // width, minlength=lens.size), out=indptr[1:])
    return indptr, (keys % width).astype(np.int32), counts.astype(np.int32)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_compiled_counts_equal_numpys(seed: int) -> None:
    _require_kernel()
    from retriever.counting import _analysis

    rng = np.random.default_rng(seed)
    # Empty texts, short ones (insertion sort) and long ones with many distinct terms (qsort).
    lens = rng.choice([0, 1, 5, 40, 300], size=200).astype(np.int64)
    ids = rng.integers(0, rng.choice([3, 60, 100_000]), size=int(lens.sum())).astype(np.int64)
    parts = _analysis.count_rows(ids, lens)
    got = [
        np.frombuffer(b, dtype=d) for b, d in zip(parts, ("int64", "int32", "int32"), strict=True)
    ]
    for g, w in zip(got, _numpy_counts(ids, lens), strict=True):
        np.testing.assert_array_equal(g, w)
        assert g.dtype == w.dtype


def test_compiled_counts_refuse_bad_input() -> None:
    _require_kernel()
    from retriever.counting import _analysis

    with pytest.raises(ValueError, match="do not add up"):
        _analysis.count_rows(np.arange(3, dtype=np.int64), np.array([1, 1], dtype=np.int64))
    with pytest.raises(ValueError, match="out of range"):
        _analysis.count_rows(np.array([-2], dtype=np.int64), np.array([1], dtype=np.int64))


def test_count_texts_same_with_and_without_the_compiled_loops() -> None:
    _require_kernel()
    texts = random_texts(5, 300)
    out = []
    for use_kernel in (True, False):
        an = Analyzer()
        out.append(count_texts(an, an.term_table(), texts, use_kernel))
    for g, w in zip(*out, strict=True):
        np.testing.assert_array_equal(g, w)


def test_a_table_with_its_own_missing_is_asked_for_new_words() -> None:
    # The compiled loop adds a plain TermTable's new words itself; a subclass's __missing__
    # must still be the one that decides.
    _require_kernel()
    from retriever.analyzer import TermTable

    asked: list[str] = []

    class Counted(TermTable):
        def __missing__(self, word: str) -> int:
            asked.append(word)
            return super().__missing__(word)

    an = Analyzer(stemmer=None)
    table = Counted(an)
    texts = ["alpha beta alpha", "gamma beta delta", "the epsilon"]
    ids, lens = _ids_of(an, table, texts)
    assert asked == ["alpha", "beta", "gamma", "delta", "the", "epsilon"]
    assert table.terms == ["alpha", "beta", "gamma", "delta", "epsilon"]
    np.testing.assert_array_equal(ids, [0, 1, 0, 2, 1, 3, 4])
    np.testing.assert_array_equal(lens, [3, 3, 1])
