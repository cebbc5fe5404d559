"""A short passage of an article's text around the words a clue matched.

The passage is the run of whole words, at most MAX_CHARS long with its "…" marks, holding
the most distinct matched terms (the earliest such run on a tie), widened evenly on both
sides up to that length. A word matches when the analyzer (the one the index was built
with, so stemmed forms match: "rivers" for "river") turns it into one of the clue's terms.
Hand-written: a sliding window over the words is a few lines, and no library picks
passages with the index's own analyzer.
"""

from __future__ import annotations

import re
from collections.abc import Collection

from .analyzer import Analyzer

MAX_CHARS = 240  # a passage with its "…" marks is at most this long
ELLIPSIS = "…"
_WORD = re.compile(r"\S+")


def _grow(spans: list[tuple[int, int]], a: int, b: int, limit: int) -> tuple[int, int]:
    """Words a..b widened one word at a time, alternately left and right, while the text
    they cover stays within `limit` characters."""
    left = True
    stuck = 0
    while stuck < 2:
        na, nb = (a - 1, b) if left else (a, b + 1)
        if na >= 0 and nb < len(spans) and spans[nb][1] - spans[na][0] <= limit:
            a, b, stuck = na, nb, 0
        else:
            stuck += 1
        left = not left
    return a, b


def snippet(text: str, analyzer: Analyzer, terms: Collection[str]) -> str:
    """The passage of `text` around the analyzed clue `terms` (see the module docstring)."""
    if len(text) <= MAX_CHARS:
        return text.strip()
    spans = [(m.start(), m.end()) for m in _WORD.finditer(text)]
    if not spans:
        return ""
    wanted = set(terms)
    words = analyzer.tokens_many(text[s:e] for s, e in spans)
    matched = [wanted.intersection(w) for w in words]
    limit = MAX_CHARS - 2 * len(ELLIPSIS)
    # Sliding window: for each first word, the longest run that fits; count distinct terms.
    best, best_at = -1, (0, 0)
    held: dict[str, int] = {}  # matched term -> how many words of the window hold it
    distinct = 0
    j = 0  # one past the window's last word; the window is empty when j == i
    for i in range(len(spans)):
        j = max(j, i)
        while j < len(spans) and spans[j][1] - spans[i][0] <= limit:
            for t in matched[j]:
                distinct += held.get(t, 0) == 0
                held[t] = held.get(t, 0) + 1
            j += 1
        if j > i:
            if distinct > best:
                best, best_at = distinct, (i, j - 1)
            for t in matched[i]:
                held[t] -= 1
                distinct -= held[t] == 0
    a, b = best_at
    if best > 0:  # centre the passage on its matched words
        first = next(x for x in range(a, b + 1) if matched[x])
        last = next(x for x in range(b, a - 1, -1) if matched[x])
        a, b = _grow(spans, first, last, limit)
    elif best < 0:  # the first word alone is longer than a passage: cut inside it
        return text[: MAX_CHARS - len(ELLIPSIS)] + ELLIPSIS
    body = text[spans[a][0] : spans[b][1]]
    return (ELLIPSIS if a > 0 else "") + body + (ELLIPSIS if b < len(spans) - 1 else "")
