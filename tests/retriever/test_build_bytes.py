"""The index folder a build writes stays byte for byte what it was, file by file.

The digests in `data/build_digests.json` were computed with the build code as it stood before
the counting and postings assembly were rewritten for speed; any change to what the builder
writes (a different term order, dtype, rounding or store line) shows up as the name of the
file whose bytes changed. Only the manifest's fields that cannot repeat (creation time, build
seconds, the corpus's absolute path) are left out of its digest.

To record new digests after an intended format change (with FORMAT_VERSION bumped):
    python -m tests.retriever.test_build_bytes --write
"""

from __future__ import annotations

import hashlib
import json
import random
import sys
from pathlib import Path
from typing import Any

import pytest

from retriever import build_index

from .helpers import write_jsonl

DEMO = Path(__file__).resolve().parents[2] / "corpus_demo" / "data" / "articles.jsonl"
DIGESTS = Path(__file__).resolve().parent / "data" / "build_digests.json"

# Word pool of the random corpus: mixed case, stopwords, digits, underscores, accents, a
# ligature and a full-width form (normalization), a Greek word, one-letter words.
_POOL = [
    "river",
    "marsh",
    "Reed",
    "reeds",
    "basket",
    "baskets",
    "woven",
    "heron",
    "herons",
    "estuary",
    "ferry",
    "ferries",
    "the",
    "a",
    "an",
    "of",
    "and",
    "THE",
    "And",
    "into",
    "over",
    "under",
    "running",
    "runs",
    "ran",
    "runner",
    "generously",
    "café",
    "naïve",
    "Ångström",
    "ﬁsh",
    "ＡＢＣ",
    "λόγος",
    "x7",
    "v2_0",
    "snake_case",
    "1999",
    "2024",
    "I",
    "o",
    "connection",
    "connected",
    "connecting",
    "relational",
    "relate",
    "Relations",
    "caress",
    "ponies",
]
_PUNCT = [" ", " ", " ", ", ", ". ", "; ", " - ", "'s ", "\n", "\t", " (", ") "]

# (name, corpus, build options): the settings whose folders are pinned.
CASES: list[tuple[str, str, dict[str, Any]]] = [
    ("demo-default", "demo", {}),
    ("demo-plain", "demo", {"stopwords": "none", "stemmer": None}),
    ("random-default", "random", {}),
    ("random-two-workers", "random", {"workers": 2}),
    ("random-custom-pattern", "random", {"token_pattern": r"\w+", "stopwords": ("ran", "x7")}),
]


def random_records(n: int = 9000, seed: int = 7) -> list[dict[str, Any]]:
    """`n` invented articles from `_POOL` (over 4,000: several counting chunks), with
    punctuation, line breaks and links."""
    rng = random.Random(seed)
    out = []
    for i in range(n):
        parts = []
        for _ in range(rng.randrange(0, 60)):
            word = rng.choice(_POOL)
            if rng.random() < 0.05:
                word = f"{word}{rng.randrange(500)}"  # a long tail of rare terms
            parts.append(word + rng.choice(_PUNCT))
        title = f"{rng.choice(_POOL).title()} {rng.choice(_POOL)} {i}"
        rec: dict[str, Any] = {"id": f"r{i}", "title": title, "text": "".join(parts).strip()}
        if i and rng.random() < 0.5:
            rec["links"] = [f"{rng.choice(_POOL).title()} {rng.choice(_POOL)} {rng.randrange(i)}"]
        if rng.random() < 0.3:
            rec["popularity"] = round(rng.random() * 50, 2)
        out.append(rec)
    return out


def folder_digests(folder: Path) -> dict[str, str]:
    """sha256 of every file in an index folder, the manifest's unrepeatable fields left out."""
    out = {}
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        data = path.read_bytes()
        if path.name == "manifest.json":
            manifest = json.loads(data)
            manifest.pop("created_at", None)
            manifest["build"].pop("seconds", None)
            manifest["build"].pop("corpus", None)
            data = json.dumps(manifest, sort_keys=True).encode()
        out[path.relative_to(folder).as_posix()] = hashlib.sha256(data).hexdigest()
    return out


def build_case(tmp: Path, name: str) -> dict[str, str]:
    """Build one pinned case into `tmp` and return its folder's digests."""
    _, corpus, options = next(c for c in CASES if c[0] == name)
    source = DEMO if corpus == "demo" else tmp / "random.jsonl"
    if corpus == "random" and not source.exists():
        write_jsonl(source, random_records())
    folder = tmp / name
    build_index(source, folder, vectors=False, **options)
    return folder_digests(folder)


@pytest.mark.parametrize("name", [c[0] for c in CASES])
def test_folder_bytes_unchanged(tmp_path: Path, name: str) -> None:
    expected = json.loads(DIGESTS.read_text())[name]
    got = build_case(tmp_path, name)
    assert sorted(got) == sorted(expected), "the folder holds other files"
    changed = [f for f in expected if got[f] != expected[f]]
    assert not changed, f"{name}: bytes changed in {changed}"


def _write() -> None:
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        digests = {name: build_case(Path(tmp), name) for name, _, _ in CASES}
    DIGESTS.parent.mkdir(exist_ok=True)
    DIGESTS.write_text(json.dumps(digests, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    if sys.argv[1:] == ["--write"]:
        _write()
