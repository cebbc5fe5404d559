"""Choosing how BM25 and the word vectors are fused, from labelled clues.

Each labelled prefix is searched once both ways (BM25's and the vectors' top `pool`); each
candidate weight then re-fuses those pools in numpy. So the choice costs one search per
prefix, not one per weight.

The weight is chosen on whole clues, as they are served: a weight that wins on the prefixes
can lose on whole clues (FOLDOC + Jargon training clues: 0.7 gained 1.3 points of recall on
prefixes and cost 1 on whole clues). The weight whose top k holds the answer of the most
whole clues (ties: the higher weight) replaces BM25's own order (w 1.0) only if the rule
also gains out of sample: the clues split into two folds by answer, each fold scored with
the weight chosen on the other, must find more answers than w 1.0 finds. The table records
every weight's recall on prefixes, whole clues and each fold's whole clues.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
from tqdm.auto import tqdm

from retriever import Index

from ..candidates import CandidatePolicy, Pools, fused_rows, search_pools
from .logs import LabelledClue
from .prefixrows import PrefixPlan, labelled_prefixes
from .refine import FOLDS, fold_of

WEIGHTS = (0.3, 0.5, 0.7, 0.85, 1.0)  # BM25's share; 1.0 keeps BM25's order over the pools


def tune_fusion(
    index: Index,
    clues: Sequence[LabelledClue],
    plan: PrefixPlan,
    k: int,
    *,
    pool: int = 100,
    weights: Sequence[float] = WEIGHTS,
    progress: bool = False,
    policy_for: Callable[[LabelledClue], CandidatePolicy] | None = None,
) -> tuple[CandidatePolicy, list[dict[str, Any]]]:
    """The hybrid policy chosen on whole clues (see the module's notes), and the table.

    `policy_for` names the vectors each clue's prefixes are searched with (the cross-fitted
    refined vectors); the chosen policy keeps the index's own vectors, the caller sets them.
    """
    pre = labelled_prefixes(index, clues, plan)
    keep = [i for i, (_, _, gold, _) in enumerate(pre.owners) if gold is not None]
    tokens = [index.analyzer.tokens(pre.texts[i]) for i in keep]
    golds = np.array([pre.owners[i][2] for i in keep], dtype=np.int64)
    full = np.array([pre.owners[i][1] == 1.0 for i in keep], dtype=bool)
    own = CandidatePolicy("hybrid", 1.0, pool)
    policies = [own if policy_for is None else policy_for(pre.kept[pre.owners[i][0]]) for i in keep]
    pools: list[Pools | None] = [None] * len(tokens)
    with tqdm(total=len(tokens), desc="fusion", unit=" prefixes", disable=not progress) as bar:
        for pol in dict.fromkeys(policies):
            at = [j for j, p in enumerate(policies) if p == pol]
            for s in range(0, len(at), 256):
                chunk = at[s : s + 256]
                got = search_pools(index, [tokens[j] for j in chunk], max(pool, k), policy=pol)
                for j, res in zip(chunk, got, strict=True):
                    pools[j] = res
                bar.update(len(chunk))
    folds = np.array([fold_of(index, pre.kept[pre.owners[i][0]]) for i in keep], dtype=np.int64)
    rows = []
    for w in weights:
        policy = CandidatePolicy("hybrid", float(w), pool)
        found = np.array(
            [
                g in fused_rows(p, k, policy)
                for g, p in zip(golds.tolist(), pools, strict=True)
                if p is not None
            ],
            dtype=bool,
        )
        by_fold = [_share(found[full & (folds == f)]) for f in range(FOLDS)]
        rows.append(
            {
                "weight": float(w),
                "recall_at_k": _share(found),
                "recall_at_k_full_clue": _share(found[full]),
                "recall_at_k_full_clue_by_fold": by_fold,
            }
        )
    best = _pick(rows, "recall_at_k_full_clue" if full.any() else "recall_at_k")
    bm25 = next((r for r in rows if r["weight"] == 1.0), None)
    if bm25 is not None and full.any():
        # Out of sample: each fold's whole clues with the weight picked on the other fold.
        sizes = [int((full & (folds == f)).sum()) for f in range(FOLDS)]
        picked = [_pick(rows, ("by_fold", (f + 1) % FOLDS)) for f in range(FOLDS)]
        held = sum(
            r["recall_at_k_full_clue_by_fold"][f] * sizes[f] for f, r in enumerate(picked)
        ) / max(sum(sizes), 1)
        bm25["held_out"] = {
            "recall_at_k_full_clue": held,
            "weights_by_fold": [r["weight"] for r in picked],
            "bm25_order": bm25["recall_at_k_full_clue"],
        }
        if not held > bm25["recall_at_k_full_clue"]:
            best = bm25
        best["gain_over_bm25_order"] = best["recall_at_k_full_clue"] - bm25["recall_at_k_full_clue"]
    for r in rows:
        r["chosen"] = r is best
    return CandidatePolicy("hybrid", best["weight"], pool), rows


def _share(found: np.ndarray) -> float:
    return float(found.mean()) if found.size else 0.0


def _pick(rows: list[dict[str, Any]], key: str | tuple[str, int]) -> dict[str, Any]:
    """The row with the best recall by `key` (a field, or ("by_fold", f)); ties: higher weight."""

    def value(r: dict[str, Any]) -> float:
        v = r["recall_at_k_full_clue_by_fold"][key[1]] if isinstance(key, tuple) else r[key]
        return round(float(v), 12)

    return max(rows, key=lambda r: (value(r), r["weight"]))
