"""Choosing BM25's k1, b and IDF variant from labelled clues, by held-out recall.

The labelled clues with an answer in the index are split by answer into two halves (seeded;
the same answer is never in both). Each grid point re-weights the index in memory
(retriever.reweight: no corpus is read or tokenised again) and searches every clue's whole
text once; recall@k and MRR (over the top k) are measured on each half. The chosen point has
the best held-out recall@k; ties go to the better held-out MRR, then to the point nearest the
index's own parameters. The tuning half's recall is shown beside it: a point that also leads
there is not an accident of the split.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from sklearn.model_selection import GroupShuffleSplit
from tqdm.auto import tqdm

from retriever import BM25Params, Index
from retriever.reweight import Reweighter

from ..errors import TrainingError
from .logs import LabelledClue

K1_GRID = (0.4, 0.6, 0.8, 1.0, 1.2, 1.4, 1.6, 1.8, 2.0)
B_GRID = (0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0)
IDF_GRID = ("okapi", "lucene")
MIN_CLUES = 4  # two per half at the least: fewer cannot be split by answer


@dataclass
class BM25Tuning:
    """The grid's rows, the chosen parameters and what the labels held."""

    rows: list[dict[str, Any]]
    chosen: BM25Params
    current: dict[str, Any]  # the row of the index's own parameters
    k: int
    seed: int
    n_clues: int
    n_tuning: int
    n_held_out: int
    no_answer: int  # clues labelled "none of these": no answer to find
    unresolved: list[dict[str, Any]] = field(default_factory=list)  # answers naming no article

    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON form (what --write saves)."""
        return {
            "k": self.k,
            "seed": self.seed,
            "chosen": self.chosen.to_dict(),
            "current": self.current,
            "clues": {
                "used": self.n_clues,
                "tuning": self.n_tuning,
                "held_out": self.n_held_out,
                "no_answer": self.no_answer,
                "unresolved": len(self.unresolved),
                "unresolved_first": self.unresolved[:10],
            },
            "rows": self.rows,
        }


def grid_points(
    k1s: Sequence[float], bs: Sequence[float], idfs: Sequence[str], base: BM25Params
) -> list[BM25Params]:
    """Every (k1, b, idf) combination, the other settings (epsilon, title weight) from `base`."""
    if not k1s or not bs or not idfs:
        raise ValueError("the grid is empty: give at least one k1, one b and one IDF variant")
    return [
        replace(base, k1=float(k1), b=float(b), idf=str(idf))
        for idf, k1, b in itertools.product(
            dict.fromkeys(idfs), dict.fromkeys(k1s), dict.fromkeys(bs)
        )
    ]


def ranks_of(
    index: Index, tokens: Sequence[Sequence[str]], golds: np.ndarray, k: int
) -> np.ndarray:
    """1-based rank of each clue's gold row in the index's top k, 0 where it is not there."""
    out = np.zeros(len(tokens), dtype=np.int64)
    for s in range(0, len(tokens), 256):  # batches: one kernel call each
        for i, hits in enumerate(index.search_token_lists(tokens[s : s + 256], k), start=s):
            for h in hits:
                if h.row == golds[i]:
                    out[i] = h.rank
                    break
    return out


def measures(ranks: np.ndarray) -> tuple[float, float]:
    """(recall@k, MRR over the top k) of 1-based ranks, 0 meaning not found."""
    if ranks.size == 0:
        return 0.0, 0.0
    found = ranks > 0
    return float(found.mean()), float(np.where(found, 1.0 / np.maximum(ranks, 1), 0.0).mean())


def split_by_answer(golds: np.ndarray, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(tuning, held-out) positions: about half the answers each, never one in both."""
    if np.unique(golds).size < 2:
        raise TrainingError("tuning needs clues with at least two different answers")
    splitter = GroupShuffleSplit(n_splits=1, test_size=0.5, random_state=seed)
    tuning, held = next(splitter.split(np.zeros(golds.size), groups=golds))
    return np.sort(tuning), np.sort(held)


def _distance(p: BM25Params, base: BM25Params) -> float:
    return abs(p.k1 - base.k1) + abs(p.b - base.b) + (p.idf != base.idf)


def tune_bm25(
    index: Index,
    clues: Sequence[LabelledClue],
    *,
    k: int = 20,
    k1s: Sequence[float] = K1_GRID,
    bs: Sequence[float] = B_GRID,
    idfs: Sequence[str] = IDF_GRID,
    seed: int = 0,
    progress: bool = False,
) -> BM25Tuning:
    """Evaluate the grid on labelled clues; the chosen point has the best held-out recall@k."""
    if k < 1:
        raise ValueError(f"k must be at least 1, got {k}")
    base = index.params
    points = grid_points(k1s, bs, idfs, base)
    texts: list[str] = []
    gold_rows: list[int] = []
    unresolved: list[dict[str, Any]] = []
    no_answer = 0
    for c in clues:
        if c.answer is None:
            no_answer += 1
            continue
        row = index.resolver.row(c.answer)
        if row is None:
            unresolved.append({"file": c.file, "line": c.line, "answer": c.answer})
            continue
        texts.append(c.clue)
        gold_rows.append(row)
    if len(texts) < MIN_CLUES:
        raise TrainingError(
            f"only {len(texts)} labelled clues name an article of this index "
            f"({len(unresolved)} name none, {no_answer} have no answer); tuning needs "
            f"at least {MIN_CLUES}"
        )
    golds = np.asarray(gold_rows, dtype=np.int64)
    tuning, held = split_by_answer(golds, seed)
    tokens = index.analyzer.tokens_many(texts)  # analysed once: the parameters do not change it
    reweighter = Reweighter(index)
    evaluated: dict[BM25Params, dict[str, Any]] = {}
    todo = points if base in points else [*points, base]  # the index's own point, always
    for p in tqdm(todo, desc="bm25 grid", unit=" points", disable=not progress):
        ranks = ranks_of(reweighter.with_params(p), tokens, golds, k)
        r_held, mrr_held = measures(ranks[held])
        r_tune, mrr_tune = measures(ranks[tuning])
        evaluated[p] = {
            "k1": p.k1,
            "b": p.b,
            "idf": p.idf,
            "recall_at_k": r_held,
            "mrr": mrr_held,
            "tuning_recall_at_k": r_tune,
            "tuning_mrr": mrr_tune,
            "current": p == base,
        }
    rows = [evaluated[p] for p in points]
    current = evaluated[base]
    best = max(
        rows,
        key=lambda r: (
            round(r["recall_at_k"], 12),
            round(r["mrr"], 12),
            -_distance(replace(base, k1=r["k1"], b=r["b"], idf=r["idf"]), base),
        ),
    )
    for r in rows:
        r["chosen"] = r is best
    return BM25Tuning(
        rows=rows,
        chosen=replace(base, k1=best["k1"], b=best["b"], idf=best["idf"]),
        current=dict(current),
        k=k,
        seed=seed,
        n_clues=len(texts),
        n_tuning=int(tuning.size),
        n_held_out=int(held.size),
        no_answer=no_answer,
        unresolved=unresolved,
    )
