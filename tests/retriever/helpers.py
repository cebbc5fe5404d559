"""Helpers for the retrieval-core tests: small corpora on disk and a plain analyzer."""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

from retriever import Index, build_index

# No stopwords, no stemming: tokens are exactly the lower-case words, as rank_bm25 is fed.
PLAIN: dict[str, Any] = {"stopwords": "none", "stemmer": None}

# The shipped demo corpus, and three shards of very different sizes over it.
DEMO = Path(__file__).resolve().parents[2] / "corpus_demo" / "data"
N_DEMO = sum(1 for line in (DEMO / "articles.jsonl").read_text("utf-8").splitlines() if line)
UNEVEN = [(0, 400), (400, 2300), (2300, N_DEMO)]


def write_jsonl(path: Path, records: Iterable[dict[str, Any]]) -> Path:
    """Write records as JSON Lines and return the path."""
    with open(path, "w", encoding="utf-8") as fh:
        for rec in records:
            fh.write(json.dumps(rec, ensure_ascii=False) + "\n")
    return path


def docs_to_records(docs: Sequence[Sequence[str]], prefix: str = "d") -> list[dict[str, Any]]:
    """Records whose text is the given tokens joined by spaces."""
    return [
        {"id": f"{prefix}{i}", "title": f"Title {prefix}{i}", "text": " ".join(d)}
        for i, d in enumerate(docs)
    ]


def plain_index(
    tmp_path: Path, docs: Sequence[Sequence[str]], name: str = "idx", **options: Any
) -> Index:
    """Index pre-tokenized documents with the plain analyzer."""
    return build_index(docs_to_records(docs), tmp_path / name, **{**PLAIN, **options})
