"""Labelled clues to a training table: prefixes, candidates, features and labels."""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from tqdm.auto import tqdm

from retriever import Hit, Index

from ..candidates import CandidatePolicy, find_candidates
from ..features import DenseInfo, FeatureRegistry, MetadataColumns, candidate_set
from .logs import LabelledClue

if TYPE_CHECKING:
    import pandas as pd


@dataclass(frozen=True)
class PrefixPlan:
    """Which prefixes of each clue become examples: shares of its words, or every N words."""

    fractions: tuple[float, ...] = (0.2, 0.4, 0.6, 0.8, 1.0)
    every_words: int | None = None

    def __post_init__(self) -> None:
        if self.every_words is not None and self.every_words < 1:
            raise ValueError(f"every_words must be at least 1, got {self.every_words}")
        if any(not 0 < f <= 1 for f in self.fractions):
            raise ValueError(f"prefix fractions must be in (0, 1], got {self.fractions}")

    def cuts(self, n_words: int) -> list[int]:
        """Distinct word counts to keep, ending with the whole clue."""
        if n_words == 0:
            return []
        if self.every_words:
            cuts = list(range(self.every_words, n_words, self.every_words))
        else:
            # The small slack keeps float noise (0.28 * 25 = 7.000000000000001) from adding a word.
            cuts = [max(1, math.ceil(f * n_words - 1e-9)) for f in self.fractions]
        return sorted(set(cuts) | {n_words})

    def label(self, kept: int, n_words: int) -> float:
        """The share of the clue a cut stands for, for grouping in reports.

        Fraction plans give the plan's own fraction (the smallest one that keeps `kept`
        words), so every clue's "40%" prefix groups together whatever its length; the
        every-N-words plan rounds the true share up to a tenth. The whole clue is 1.0.
        """
        if kept >= n_words:
            return 1.0
        if not self.every_words:
            for f in sorted(self.fractions):
                if max(1, math.ceil(f * n_words - 1e-9)) == kept:
                    return float(f)
        return math.ceil(kept / n_words * 10 - 1e-9) / 10


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


@dataclass
class Prefixes:
    """Every kept prefix of every labelled clue, in order, with what it belongs to."""

    texts: list[str]
    owners: list[tuple[int, float, int | None, dict[str, Any]]]  # clue, fraction, gold, meta
    unresolved: list[dict[str, Any]]
    n_clues: int
    kept: list[LabelledClue] = field(default_factory=list)  # clue n of owners is kept[n]


def labelled_prefixes(index: Index, clues: Sequence[LabelledClue], plan: PrefixPlan) -> Prefixes:
    """The prefixes `plan` keeps of each clue, its gold row resolved (unresolved ones listed)."""
    out = Prefixes([], [], [], 0)
    for c in clues:
        gold: int | None = None
        if c.answer is not None:
            gold = index.resolver.row(c.answer)
            if gold is None:
                out.unresolved.append(
                    {"file": c.file, "line": c.line, "answer": c.answer, "clue": c.clue[:80]}
                )
                continue
        words = c.clue.split()
        cuts = plan.cuts(len(words))
        if not cuts:
            continue
        for m in cuts:
            out.texts.append(" ".join(words[:m]))
            out.owners.append((out.n_clues, plan.label(m, len(words)), gold, c.metadata))
        out.kept.append(c)
        out.n_clues += 1
    return out


def _find_all(
    index: Index,
    tokens_all: list[list[str]],
    k: int,
    policy: CandidatePolicy,
    policy_for: Callable[[LabelledClue], CandidatePolicy] | None,
    pre: Prefixes,
    progress: bool,
) -> list[tuple[list[Hit], DenseInfo | None]]:
    """Every prefix's candidates, searched in batches of prefixes sharing a policy."""
    policies = [
        policy if policy_for is None else policy_for(pre.kept[cid]) for cid, *_ in pre.owners
    ]
    found: list[tuple[list[Hit], DenseInfo | None] | None] = [None] * len(tokens_all)
    with tqdm(
        total=len(tokens_all), desc="candidates", unit=" prefixes", disable=not progress
    ) as bar:
        for pol in dict.fromkeys(policies):
            at = [i for i, p in enumerate(policies) if p == pol]
            for s in range(0, len(at), 256):  # batches: one kernel call each
                chunk = at[s : s + 256]
                got = find_candidates(index, [tokens_all[i] for i in chunk], k, pol)
                for i, res in zip(chunk, got, strict=True):
                    found[i] = res
                bar.update(len(chunk))
    return [f for f in found if f is not None]


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
    policy_for: Callable[[LabelledClue], CandidatePolicy] | None = None,
) -> TrainingTable:
    """Search every prefix of every clue, featurize its candidates and label them.

    The candidate sets are made as serving makes them (`find_candidates` with `candidates`,
    BM25's top k by default); `policy_for` gives a clue's own policy instead (the cross-fitted
    vectors of reranker/training/refine.py).
    """
    plan = plan or PrefixPlan()
    metadata = metadata or MetadataColumns()
    policy = candidates or CandidatePolicy()
    pre = labelled_prefixes(index, clues, plan)
    texts, owners, unresolved, n_clues = pre.texts, pre.owners, pre.unresolved, pre.n_clues
    # Each prefix is analyzed once: its tokens serve the search and the features.
    tokens_all = [index.analyzer.tokens(t) for t in texts]
    words_all = [index.analyzer.words(t) for t in texts]
    found = _find_all(index, tokens_all, k, policy, policy_for, pre, progress)
    names = list(feature_names)
    all_names = names + metadata.names
    blocks: list[np.ndarray] = []
    cols: dict[str, list[np.ndarray]] = {
        n: [] for n in ("y", "group", "clue_id", "fraction", "score", "rank", "row", "words")
    }
    for g, (text, tokens, words, (hits, dense), (cid, frac, gold, meta)) in enumerate(
        tqdm(
            zip(texts, tokens_all, words_all, found, owners, strict=True),
            total=len(texts),
            desc="features",
            unit=" prefixes",
            disable=not progress,
            mininterval=0.5,
        )
    ):
        if not hits:
            continue
        cs = candidate_set(index, text, hits, meta, tokens, words, dense)
        x = registry.matrix(cs, names)
        if metadata.names:
            x = np.hstack([x, np.tile(metadata.row(meta), (len(cs), 1))])
        blocks.append(x)
        n = len(cs)
        cols["y"].append(
            (cs.rows == gold).astype(np.int8) if gold is not None else np.zeros(n, np.int8)
        )
        cols["group"].append(np.full(n, g, np.int64))
        cols["clue_id"].append(np.full(n, cid, np.int64))
        cols["fraction"].append(np.full(n, frac))
        cols["score"].append(cs.scores)
        cols["rank"].append(cs.ranks)
        cols["row"].append(cs.rows)
        cols["words"].append(np.full(n, len(words), np.int64))

    def cat(name: str, dtype: Any) -> np.ndarray:
        return np.concatenate(cols[name]).astype(dtype) if cols[name] else np.zeros(0, dtype)

    return TrainingTable(
        X=np.vstack(blocks) if blocks else np.zeros((0, len(all_names))),
        y=cat("y", np.int8),
        group=cat("group", np.int64),
        clue_id=cat("clue_id", np.int64),
        fraction=cat("fraction", np.float64),
        score=cat("score", np.float64),
        rank=cat("rank", np.int64),
        row=cat("row", np.int64),
        words=cat("words", np.int64),
        feature_names=all_names,
        unresolved=unresolved,
        n_clues=n_clues,
        n_prefixes=len(texts),
        clues=pre.kept,
        texts=texts,
    )
