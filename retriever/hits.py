"""One retrieved article, as every search returns it."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Hit:
    """One retrieved article: its id, title, BM25 score, 1-based rank and row in the index."""

    doc_id: str
    title: str
    score: float
    rank: int
    row: int
