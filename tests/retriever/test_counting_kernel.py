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
