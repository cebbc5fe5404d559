"""Snippets: the passage with the most distinct matched terms, cut at word boundaries.

The reference below tries every run of whole words that fits (a brute force, written out
plainly here), and the snippet must hold as many distinct matched terms as the best of them.
"""

from __future__ import annotations

import random
import re

import pytest

from retriever import Analyzer
from retriever.snippets import ELLIPSIS, MAX_CHARS, snippet

ANALYZER = Analyzer()  # the default analyzer: English stemming and stopwords
FILLER = [
    "the",
    "old",
    "road",
    "ran",
    "past",
    "a",
    "quiet",
    "field",
    "where",
    "sheep",
    "grazed",
    "beside",
    "a",
    "low",
    "stone",
    "wall",
]


def _distinct(text: str, terms: set[str]) -> int:
    return len(set(ANALYZER.tokens(text)) & terms)


def _best_possible(text: str, terms: set[str]) -> int:
    """Most distinct matched terms any run of whole words within the length limit holds."""
    spans = [(m.start(), m.end()) for m in re.finditer(r"\S+", text)]
    limit = MAX_CHARS - 2 * len(ELLIPSIS)
    best = 0
    for i in range(len(spans)):
        for j in range(i, len(spans)):
            if spans[j][1] - spans[i][0] > limit:
                break
            best = max(best, _distinct(text[spans[i][0] : spans[j][1]], terms))
    return best


def _text(rng: random.Random, planted: list[str], n_words: int) -> str:
    words = [rng.choice(FILLER) for _ in range(n_words)]
    for w in planted:
        words[rng.randrange(n_words)] = w
    return " ".join(words) + "."


@pytest.mark.parametrize("seed", range(12))
def test_snippet_holds_the_most_matched_terms_and_is_bounded(seed: int) -> None:
    rng = random.Random(seed)
    # Inflected forms in the text, other forms in the clue: they meet through the stemmer.
    planted = ["harbours", "lighthouses", "fishermen", "sailed", "storms"]
    text = _text(rng, rng.sample(planted, 3) + rng.sample(planted, 2), rng.randrange(60, 200))
    clue = "harbour lighthouse sailing storm fisherman"
    terms = set(ANALYZER.tokens(clue))
    got = snippet(text, ANALYZER, ANALYZER.tokens(clue))
    assert len(got) <= MAX_CHARS
    assert len(got) >= 160 or len(text) <= MAX_CHARS  # widened to a useful length
    body = got.removeprefix(ELLIPSIS).removesuffix(ELLIPSIS)
    start = text.index(body)
    # Whole words: the passage starts and ends at word boundaries.
    assert start == 0 or text[start - 1] == " "
    end = start + len(body)
    assert end == len(text) or text[end] == " "
    assert got.startswith(ELLIPSIS) == (start > 0)
    assert got.endswith(ELLIPSIS) == (end < len(text))
    assert _distinct(body, terms) == _best_possible(text, terms) > 0


def test_short_text_is_whole_and_no_match_gives_the_opening() -> None:
    assert snippet("A short text.", ANALYZER, ["short"]) == "A short text."
    long_text = " ".join(["meadow"] * 100)
    got = snippet(long_text, ANALYZER, ["harbour"])
    assert got.startswith("meadow") and got.endswith(ELLIPSIS) and len(got) <= MAX_CHARS


def test_a_word_longer_than_a_passage_is_cut() -> None:
    got = snippet("x" * 500, ANALYZER, ["x"])
    assert len(got) == MAX_CHARS and got.endswith(ELLIPSIS)
