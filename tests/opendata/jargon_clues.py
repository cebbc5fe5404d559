"""An open evaluation set from Debian's dict-foldoc and dict-jargon packages.

FOLDOC's entries are the corpus. The Jargon File's definitions of headwords that FOLDOC
also has are the clues, answered by that FOLDOC entry: each clue has every token of its
headword masked, and clues sharing 6 or more consecutive tokens with their answer's text are
dropped (FOLDOC quotes the Jargon File in places; such a clue would test copy detection).
Clues are split into train and test by answer, seeded, so no answer is in both.

Sources: the dictd files of Debian's dict-foldoc and dict-jargon packages (same format;
see tests/retriever/foldoc.py for how they are read).
"""

from __future__ import annotations

import gzip
import random
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ..retriever.foldoc import CROSS_REF, FOLDOC_DIR, b64_number, read_foldoc

JARGON_DICT = FOLDOC_DIR / "jargon.dict.dz"
JARGON_INDEX = FOLDOC_DIR / "jargon.index"
_WORD = re.compile(r"\w+")
_TAG = re.compile(r"\[[^\]]*\]")  # usage tags such as [common]
SHINGLE = 6  # consecutive shared tokens that disqualify a clue


@dataclass(frozen=True)
class Clue:
    """One clue: its masked text, the headword it describes and the answer's article id."""

    text: str
    headword: str
    answer: str


def words(text: str) -> list[str]:
    """Lower-cased word tokens, as the masking and the overlap check see them."""
    return [w.casefold() for w in _WORD.findall(text)]


def read_jargon(path: Path = JARGON_DICT, index: Path = JARGON_INDEX) -> dict[str, str]:
    """Headword -> definition text (pronunciation line and usage tags dropped)."""
    with gzip.open(path) as fh:
        data = fh.read()
    out: dict[str, str] = {}
    for line in index.read_text(encoding="utf-8").splitlines():
        word, off, length = line.split("\t")
        if word.startswith("00-database") or word in out:
            continue
        entry = data[b64_number(off) : b64_number(off) + b64_number(length)].decode("utf-8")
        head, _, body = entry.partition("\n\n")
        text = " ".join(CROSS_REF.sub(lambda m: m.group(1), _TAG.sub(" ", body)).split())
        if text and head.strip():
            out[head.split("\n")[0].strip()] = text
    return out


def mask(text: str, headword: str) -> str:
    """`text` with every token of `headword` removed (case-insensitive, whole words)."""
    drop = set(words(headword))
    return " ".join(w for w in _WORD.findall(text) if w.casefold() not in drop)


def shares_run(clue: str, article: str, n: int = SHINGLE) -> bool:
    """True when the two texts share n consecutive tokens."""
    a, b = words(clue), words(article)
    grams = {tuple(b[i : i + n]) for i in range(len(b) - n + 1)}
    return any(tuple(a[i : i + n]) in grams for i in range(len(a) - n + 1))


def build_set(
    records: list[dict[str, Any]] | None = None, *, seed: int = 0, test_share: float = 0.5
) -> tuple[list[dict[str, Any]], list[Clue], list[Clue], dict[str, int]]:
    """(FOLDOC records, train clues, test clues, counts of what was kept and dropped)."""
    records = records if records is not None else read_foldoc()
    by_name: dict[str, str] = {}
    for r in records:
        for name in (r["title"], *r["aliases"]):
            by_name.setdefault(name.casefold(), r["id"])
    text_of = {r["id"]: r["text"] for r in records}
    jargon = read_jargon()
    clues: list[Clue] = []
    counts = {"jargon_entries": len(jargon), "matched": 0, "dropped_overlap": 0, "empty": 0}
    for head, definition in jargon.items():
        answer = by_name.get(head.casefold())
        if answer is None:
            continue
        counts["matched"] += 1
        text = mask(definition, head)
        if len(words(text)) < 3:
            counts["empty"] += 1
            continue
        if shares_run(text, text_of[answer]):
            counts["dropped_overlap"] += 1
            continue
        clues.append(Clue(text, head, answer))
    answers = sorted({c.answer for c in clues})
    random.Random(seed).shuffle(answers)
    test_answers = set(answers[: round(len(answers) * test_share)])
    test = [c for c in clues if c.answer in test_answers]
    train = [c for c in clues if c.answer not in test_answers]
    counts.update(clues=len(clues), train=len(train), test=len(test), articles=len(records))
    return records, train, test, counts


def truncate(text: str, share: float) -> str:
    """The first `share` of a clue's words (at least one)."""
    toks = text.split()
    return " ".join(toks[: max(1, round(len(toks) * share))])
