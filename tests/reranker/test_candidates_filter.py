"""Hybrid candidate sets under a metadata filter equal the fusion of two exhaustive searches
over the allowed articles (BM25 over all scores, the vectors over all dot products)."""

from __future__ import annotations

import random
from pathlib import Path

import numpy as np
import pytest

from reranker.candidates import CandidatePolicy, find_candidates
from retriever import build_index
from retriever.dense import dot
from retriever.hybrid import fuse
from tests.retriever.test_metafilter import SPECS, WORDS, _records


@pytest.mark.parametrize("ann", [False, True])
def test_filtered_hybrid_sets_equal_brute_force_fusion(tmp_path: Path, ann: bool) -> None:
    opts = {"dim": 8, "epochs": 2, "seed": 1, "threads": 1}
    if ann:
        opts["ann_min_articles"] = 50  # an HNSW graph: the filtered search is still exact
    idx = build_index(_records(240, seed=11), tmp_path / "h", vectors=opts)
    assert idx.dense is not None
    docvec = np.asarray(idx.dense.vectors.docvec)
    policy = CandidatePolicy("hybrid", 0.5, 30, "minmax")
    rng = random.Random(8)
    for spec in SPECS[:5]:
        mask = idx.filter_mask(spec)
        token_lists = [idx.analyzer.tokens(" ".join(rng.sample(WORDS, 3))) for _ in range(4)]
        found = find_candidates(idx, token_lists, 10, policy, mask)
        for tokens, (hits, _) in zip(token_lists, found, strict=True):
            scores = idx.score_tokens(tokens)
            b = np.flatnonzero(mask & (scores != 0))
            b = b[np.lexsort((b, -scores[b]))][:30]
            tids, qtf = idx.term_ids(tokens)
            qv = idx.dense.vectors.query_vector(tids, qtf)
            assert qv is not None
            d = np.flatnonzero(mask & np.any(docvec != 0, axis=1))
            sims = dot(docvec[d], qv)
            order = np.lexsort((d, -sims))[:30]
            rows, _ = fuse(b, scores[b], d[order], sims[order], weight=0.5, fusion="minmax")
            assert sorted(h.row for h in hits) == sorted(rows[:10].tolist())
            assert all(mask[h.row] for h in hits)
