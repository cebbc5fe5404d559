"""One retrieved article, as every search returns it."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TypeAlias

import numpy as np

# What a batch search takes: analyzed clues, and an optional row mask (a metadata filter's).
TokenLists: TypeAlias = Sequence[Sequence[str]]
RowMask: TypeAlias = np.ndarray | None


@dataclass(frozen=True)
class Hit:
    """One retrieved article: its id, title, BM25 score, 1-based rank and row in the index."""

    doc_id: str
    title: str
    score: float
    rank: int
    row: int


def ranked_hits(
    results: Sequence[tuple[np.ndarray, np.ndarray]], ids: Sequence[str], titles: Sequence[str]
) -> list[list[Hit]]:
    """Hits of each (rows, scores) of a batch, best first, ranked from 1; `ids` and `titles`
    are those of all the batch's rows in the same order (each row's as often as it comes)."""
    out: list[list[Hit]] = []
    at = 0
    for r, sc in results:
        n = r.size
        out.append(
            [
                Hit(doc_id, title, score, i + 1, row)
                for i, (doc_id, title, row, score) in enumerate(
                    zip(ids[at : at + n], titles[at : at + n], r.tolist(), sc.tolist(), strict=True)
                )
            ]
        )
        at += n
    return out
