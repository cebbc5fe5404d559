"""Test data: read FOLDOC from Debian's dict-foldoc files, and make larger corpora from its words.

The dictd index lines are `headword<TAB>offset<TAB>length`, where offset and length are
numbers written in dictd's base64 digits (most significant first); the `.dict.dz` file is
gzip-compatible, so `gzip.open` reads it. Entries point to each other with `{name}`.
"""

from __future__ import annotations

import gzip
import os
import random
import re
from collections import defaultdict
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

FOLDOC_DIR = Path("/usr/share/dictd")
FOLDOC_DICT = FOLDOC_DIR / "foldoc.dict.dz"
FOLDOC_INDEX = FOLDOC_DIR / "foldoc.index"
_B64 = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/"
_DIGIT = {c: i for i, c in enumerate(_B64)}
CROSS_REF = re.compile(r"\{([^{}]*)\}")


def b64_number(text: str) -> int:
    """Decode one dictd base64 number ('Gb9L' -> offset)."""
    value = 0
    for ch in text:
        value = value * 64 + _DIGIT[ch]
    return value


def require_dictionary(files: tuple[Path, Path], package: str) -> None:
    """Skip the calling test when a Debian dictionary package's files are missing, unless
    HUNCHWISE_REQUIRE_FOLDOC=1 (CI installs them, so there a missing file is a failure)."""
    if all(f.exists() for f in files):
        return
    reason = f"{files[0]} not found (apt-get install {package})"
    if os.environ.get("HUNCHWISE_REQUIRE_FOLDOC") == "1":
        pytest.fail(f"HUNCHWISE_REQUIRE_FOLDOC=1 but {reason}")
    pytest.skip(reason)


def require_foldoc() -> None:
    """Skip the calling test when FOLDOC is not installed, unless HUNCHWISE_REQUIRE_FOLDOC=1."""
    require_dictionary((FOLDOC_DICT, FOLDOC_INDEX), "dict-foldoc")


def link_name(ref: str) -> str:
    """A cross-reference as a link: whitespace (line breaks inside braces) collapsed."""
    return " ".join(ref.split())


def read_foldoc() -> list[dict[str, Any]]:
    """FOLDOC entries as corpus records: title, other headwords as aliases, `{...}` as links.

    Entries sharing a byte range are one article; dictd's own `00-database-*` entries and
    later entries repeating an earlier title are left out (titles must be unique).
    """
    with gzip.open(FOLDOC_DICT) as fh:
        data = fh.read()
    heads: dict[tuple[int, int], list[str]] = defaultdict(list)
    for line in FOLDOC_INDEX.read_text(encoding="utf-8").splitlines():
        word, b64_off, b64_len = line.split("\t")
        heads[(b64_number(b64_off), b64_number(b64_len))].append(word)
    records: list[dict[str, Any]] = []
    seen: set[str] = set()
    for (off, length), words in sorted(heads.items()):
        if any(w.startswith("00-database") for w in words):
            continue
        entry = data[off : off + length].decode("utf-8")
        head, _, body = entry.partition("\n\n")
        names = [n.strip() for n in head.split("\n") if n.strip()]
        if not names or names[0] in seen:
            continue
        seen.add(names[0])
        text = " ".join(body.split())
        records.append(
            {
                "id": f"foldoc-{off}",
                "title": names[0],
                "text": CROSS_REF.sub(lambda m: m.group(1), text),
                "links": [link_name(r) for r in CROSS_REF.findall(body)],
                "aliases": names[1:],
            }
        )
    return records


def foldoc_words() -> list[str]:
    """Words of FOLDOC's entries, in order, or invented words when FOLDOC is missing."""
    if FOLDOC_DICT.exists():
        with gzip.open(FOLDOC_DICT) as fh:
            text = fh.read().decode("utf-8", "replace")
        return re.findall(r"[A-Za-z][a-z]+", text)
    rng = random.Random(7)
    syll = ["ka", "ro", "mi", "tes", "lun", "dor", "ax", "vel", "qui", "zen", "pra", "sto"]
    vocab = ["".join(rng.choices(syll, k=rng.randint(1, 4))) for _ in range(20_000)]
    # Zipf-like use of the invented vocabulary.
    return [vocab[min(int(rng.paretovariate(1.1)) - 1, len(vocab) - 1)] for _ in range(400_000)]


def synthetic_articles(
    n: int, seed: int = 0, words: list[str] | None = None
) -> Iterator[dict[str, Any]]:
    """`n` articles of FOLDOC word runs, lightly perturbed so the vocabulary keeps growing."""
    words = words if words is not None else foldoc_words()
    rng = random.Random(seed)
    n_words = len(words)
    for i in range(n):
        length = min(int(rng.lognormvariate(4.6, 0.6)), 1200)
        start = rng.randrange(max(n_words - length, 1))
        run = words[start : start + length]
        # A few invented variants per article imitate the long tail of names in a big corpus.
        for _ in range(max(1, length // 40)):
            j = rng.randrange(len(run)) if run else 0
            if run:
                run[j] = f"{run[j]}{rng.choice('aeioux')}{rng.randrange(1000)}"
        title_words = run[:2] if len(run) >= 2 else ["entry"]
        yield {
            "id": f"a{i}",
            "title": f"{' '.join(title_words).title()} {i}",
            "text": " ".join(run),
            "links": [
                " ".join(words[(start + 7) % n_words : (start + 9) % n_words])
                + f" {rng.randrange(n)}"
            ],
            "popularity": round(rng.random() * 100, 2),
        }


def clue_from(text: str, rng: random.Random, words: list[str]) -> str:
    """A 20-40 word clue-like query: a window of `text` with some words swapped for others."""
    toks = text.split()
    size = rng.randint(20, 40)
    start = rng.randrange(max(len(toks) - size, 1))
    window = toks[start : start + size]
    for j in range(len(window)):
        if rng.random() < 0.3:
            window[j] = rng.choice(words)
    return " ".join(window)
