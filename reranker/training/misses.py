"""The evaluation's worst-missed clues: the right answer far down the list or not in it at all."""

from __future__ import annotations

from typing import Any

import numpy as np

from retriever import Index

from .table import TrainingTable

SHOWN_CANDIDATES = 3


def worst_missed(
    index: Index, table: TrainingTable, prob: np.ndarray, limit: int = 10
) -> list[dict[str, Any]]:
    """Whole clues whose right answer the model does not put first, worst first.

    Worst means: the answer absent from the candidates first (most confident top candidate
    first among those), then the answer furthest down the model's order. Each row gives the
    clue, where it came from, the right answer, its rank and probability (None when absent),
    the "none of these" share, and the top candidates with their probabilities. Clues labelled
    "none of these" have no right answer to miss and are left out.
    """
    full = np.flatnonzero(table.fraction == 1.0)
    if full.size == 0 or limit < 1:
        return []
    g = table.group[full]
    starts = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
    ends = np.r_[starts[1:], g.size]
    found: list[tuple[tuple[float, float], dict[str, Any]]] = []
    for a, b in zip(starts, ends, strict=True):
        rows = full[a:b]
        clue = table.clues[int(table.clue_id[rows[0]])]
        if clue.answer is None:
            continue
        # The model's order: probability, then BM25 score (as clue_metrics breaks ties).
        order = rows[np.lexsort((-table.score[rows], -prob[rows]))]
        hit = np.flatnonzero(table.y[order] == 1)
        rank = int(hit[0]) + 1 if hit.size else None
        if rank == 1:
            continue
        top = order[:SHOWN_CANDIDATES]
        titles = index.titles.take(table.row[top])
        gold = index.resolver.row(clue.answer)
        key = (0.0 if rank is None else 1.0, -float(prob[order[0]]) if rank is None else -rank)
        found.append(
            (
                key,
                {
                    "clue": clue.clue,
                    "file": clue.file,
                    "line": clue.line,
                    "answer": clue.answer,
                    "answer_title": index.titles[gold] if gold is not None else clue.answer,
                    "answer_rank": rank,
                    "answer_probability": float(prob[order[hit[0]]]) if rank else None,
                    "candidates": len(rows),
                    "none_of_these": float(max(0.0, 1.0 - prob[rows].sum())),
                    "top": [
                        {"title": t, "probability": float(prob[r])}
                        for t, r in zip(titles, top, strict=True)
                    ],
                },
            )
        )
    found.sort(key=lambda item: item[0])
    return [row for _, row in found[:limit]]
