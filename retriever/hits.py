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
