"""Choosing how BM25 and the word vectors are fused, from labelled clues.

Each labelled prefix is searched once both ways (BM25's and the vectors' top `pool`); each
candidate weight then re-fuses those pools in numpy, and the weight whose top k holds the
gold answer most often wins (ties go to the higher weight, nearer BM25's own order). So the
choice costs one search per prefix, not one per weight.
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
    """The hybrid policy with the best recall@k on the labelled prefixes, and the table.

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
        rows.append(
            {
                "weight": float(w),
                "recall_at_k": float(found.mean()) if found.size else 0.0,
                "recall_at_k_full_clue": float(found[full].mean()) if full.any() else 0.0,
            }
        )
    best = max(rows, key=lambda r: (round(r["recall_at_k"], 12), r["weight"]))
    bm25 = next((r for r in rows if r["weight"] == 1.0), None)
    for r in rows:
        r["chosen"] = r is best
    policy = CandidatePolicy("hybrid", best["weight"], pool)
    if bm25 is not None:
        best["gain_over_bm25_order"] = best["recall_at_k"] - bm25["recall_at_k"]
    return policy, rows
