"""A training table's rows: the prefixes kept of each labelled clue, and the candidates,
features and labels of a run of prefixes (the one function both the in-process build and
the Ray workers of reranker/training/tableblocks.py call)."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from tqdm.auto import tqdm

from retriever import Hit, Index

from ..candidates import CandidatePolicy, find_candidates
from ..features import DenseInfo, FeatureRegistry, MetadataColumns, candidate_set
from .logs import LabelledClue


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
    policies: Sequence[CandidatePolicy],
    progress: bool,
) -> list[tuple[list[Hit], DenseInfo | None]]:
    """Every prefix's candidates, searched in batches of prefixes sharing a policy."""
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


def prefix_rows(
    index: Index,
    texts: Sequence[str],
    owners: Sequence[tuple[int, float, int | None, dict[str, Any]]],
    groups: Sequence[int],
    registry: FeatureRegistry,
    feature_names: Sequence[str],
    *,
    k: int,
    metadata: MetadataColumns,
    candidates: CandidatePolicy,
    policies: Sequence[CandidatePolicy] | None = None,
    progress: bool = False,
) -> dict[str, np.ndarray]:
    """The table's columns (`X` and the bookkeeping ones) for some prefixes: `texts`, their
    `owners` (clue, fraction, gold row, metadata) and group ids. Each prefix's rows depend
    on that prefix alone, so blocks of prefixes give the rows the whole list gives.
    `policies`: each prefix's own candidate policy instead of `candidates` (the cross-fitted
    vectors of reranker/training/refine.py)."""
    # Each prefix is analyzed once: its tokens serve the search and the features.
    tokens_all = [index.analyzer.tokens(t) for t in texts]
    words_all = [index.analyzer.words(t) for t in texts]
    found = _find_all(index, tokens_all, k, policies or [candidates] * len(texts), progress)
    names = list(feature_names)
    all_names = names + metadata.names
    blocks: list[np.ndarray] = []
    cols: dict[str, list[np.ndarray]] = {
        n: [] for n in ("y", "group", "clue_id", "fraction", "score", "rank", "row", "words")
    }
    for g, text, tokens, words, (hits, dense), (cid, frac, gold, meta) in tqdm(
        zip(groups, texts, tokens_all, words_all, found, owners, strict=True),
        total=len(texts),
        desc="features",
        unit=" prefixes",
        disable=not progress,
        mininterval=0.5,
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
    out = {
        name: np.concatenate(parts).astype(_DTYPES[name]) if parts else np.zeros(0, _DTYPES[name])
        for name, parts in cols.items()
    }
    out["X"] = np.vstack(blocks) if blocks else np.zeros((0, len(all_names)))
    return out


# Each bookkeeping column's type (the in-process and the distributed builds share it).
_DTYPES: dict[str, Any] = {
    "y": np.int8,
    "group": np.int64,
    "clue_id": np.int64,
    "fraction": np.float64,
    "score": np.float64,
    "rank": np.int64,
    "row": np.int64,
    "words": np.int64,
}
