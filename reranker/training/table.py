"""Labelled clues to a training table: prefixes, candidates, features and labels."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from retriever import Index
from retriever.cluster import Runner

from ..candidates import CandidatePolicy
from ..features import FeatureRegistry, MetadataColumns
from .logs import LabelledClue
from .prefixrows import PrefixPlan, labelled_prefixes, prefix_rows
from .tableblocks import distributed_rows

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["PrefixPlan", "TrainingTable", "build_table"]


@dataclass
class TrainingTable:
    """One row per (clue prefix, candidate). Arrays share the first dimension n."""

    X: np.ndarray  # float64, shape (n, n_features)
    y: np.ndarray  # int8, shape (n,): 1 for the gold answer
    group: np.ndarray  # int64, shape (n,): one id per clue prefix
    clue_id: np.ndarray  # int64, shape (n,): one id per clue (cross-validation groups)
    fraction: np.ndarray  # float64, shape (n,): share of the clue revealed (PrefixPlan.label)
    score: np.ndarray  # float64, shape (n,): BM25 score
    rank: np.ndarray  # int64, shape (n,)
    row: np.ndarray  # int64, shape (n,): index row of the candidate
    words: np.ndarray  # int64, shape (n,): words in the clue prefix (the analyzer's words)
    feature_names: list[str]
    unresolved: list[dict[str, Any]] = field(default_factory=list)
    n_clues: int = 0
    n_prefixes: int = 0
    clues: list[LabelledClue] = field(default_factory=list)  # the kept clues, by clue_id
    texts: list[str] = field(default_factory=list)  # each clue prefix's text, by group

    def columns(self, names: Sequence[str]) -> np.ndarray:
        """The feature columns `names`, in that order."""
        pos = {n: i for i, n in enumerate(self.feature_names)}
        missing = [n for n in names if n not in pos]
        if missing:
            raise ValueError(f"the table has no features {missing}")
        return self.X[:, [pos[n] for n in names]]

    def to_frame(self) -> pd.DataFrame:
        """The table as a pandas DataFrame (features plus bookkeeping columns)."""
        import pandas as pd  # here, not at the top: serving never builds a table

        df = pd.DataFrame(self.X, columns=self.feature_names)
        for name in ("y", "group", "clue_id", "fraction", "score", "rank", "row", "words"):
            df[f"_{name}"] = getattr(self, name)
        return df

    def recall(self) -> float:
        """Share of full-clue prefixes whose gold answer is among the candidates."""
        full = self.fraction == 1.0
        if not full.any():
            return 0.0
        groups = np.unique(self.group[full])
        hit = np.unique(self.group[full & (self.y == 1)])
        return float(hit.size / groups.size)


def build_table(
    index: Index,
    clues: Sequence[LabelledClue],
    registry: FeatureRegistry,
    feature_names: Sequence[str],
    *,
    k: int = 20,
    plan: PrefixPlan | None = None,
    metadata: MetadataColumns | None = None,
    candidates: CandidatePolicy | None = None,
    progress: bool = False,
    runner: Runner | None = None,
    policy_for: Callable[[LabelledClue], CandidatePolicy] | None = None,
) -> TrainingTable:
    """Search every prefix of every clue, featurize its candidates and label them.

    The candidate sets are made as serving makes them (`find_candidates` with `candidates`,
    BM25's top k by default). `runner`: a Ray runner (retriever/cluster.py) to build the
    rows in blocks of prefixes on its workers (reranker/training/tableblocks.py); the table
    is the same. `policy_for` gives a clue's own policy instead of `candidates` (the
    cross-fitted vectors of reranker/training/refine.py).
    """
    plan = plan or PrefixPlan()
    metadata = metadata or MetadataColumns()
    policy = candidates or CandidatePolicy()
    pre = labelled_prefixes(index, clues, plan)
    policies = None if policy_for is None else [policy_for(pre.kept[cid]) for cid, *_ in pre.owners]
    if runner is not None and runner.ray is not None:
        cols = distributed_rows(
            runner, index, pre, registry, feature_names, k, metadata, policy, policies
        )
    else:
        cols = prefix_rows(
            index,
            pre.texts,
            pre.owners,
            range(len(pre.texts)),
            registry,
            feature_names,
            k=k,
            metadata=metadata,
            candidates=policy,
            policies=policies,
            progress=progress,
        )
    return TrainingTable(
        X=cols["X"],
        y=cols["y"],
        group=cols["group"],
        clue_id=cols["clue_id"],
        fraction=cols["fraction"],
        score=cols["score"],
        rank=cols["rank"],
        row=cols["row"],
        words=cols["words"],
        feature_names=list(feature_names) + metadata.names,
        unresolved=pre.unresolved,
        n_clues=pre.n_clues,
        n_prefixes=len(pre.texts),
        clues=pre.kept,
        texts=pre.texts,
    )
