"""Ranking a clue: BM25 candidates -> features -> probabilities -> decision."""

from __future__ import annotations

import functools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from retriever import Hit, Index
from retriever.batches import batch_threads, map_parts
from retriever.snippets import snippet

from .candidates import CandidatePolicy, find_candidates
from .decision import Decision, Payoff, choose_threshold, decide
from .features import DenseInfo, FeatureRegistry, candidate_set, default_registry
from .loading import DEFAULT_K, ServedModel


@dataclass(frozen=True)
class ScoredCandidate:
    """A candidate as served: BM25 evidence, the model's probability, optionally its features."""

    doc_id: str
    title: str
    qualifier: str
    score: float
    rank: int
    probability: float | None  # its share of the clue's distribution (with a model)
    features: dict[str, float]
    pointwise: float | None = None  # the candidate model's own P(answer), before sharing out
    snippet: str | None = None  # a passage of its text around the clue's words, when asked


@dataclass(frozen=True)
class Ranking:
    """Everything known about one clue: candidates best first, and what to do now."""

    clue: str
    candidates: list[ScoredCandidate]
    decision: Decision
    model_version: str | None
    index_version: str
    n_tokens: int
    k: int  # candidates asked for (the reply holds at most this many)
    model_k: int | None  # candidates the features were computed over; None without a model
    # P(the answer is among the model's k candidates); the candidates' probabilities sum to
    # it, and 1 - in_candidates is the "none of these" share. None without a model.
    in_candidates: float | None = None
    # The metadata filter the candidates were chosen under (None: the whole index).
    where: dict[str, Any] | None = None

    @property
    def none_of_these(self) -> float | None:
        """P(none of the candidates is the answer)."""
        return None if self.in_candidates is None else 1.0 - self.in_candidates


def _ks(model: ServedModel | None, k: int | None) -> tuple[int, int]:
    """(candidates to return, candidates to search and featurize) for a requested k.

    The rival-relative features (softmax, z-score, gaps, ratios to the best) describe a
    candidate among the others of its set, and the model learned them on sets of exactly
    its own k; a reply cut from a larger or smaller set would get other probabilities. So
    with a model the set is always the model's k, and k only cuts the reply.
    """
    if model is None:
        want = DEFAULT_K if k is None else k
        if want < 1:
            raise ValueError(f"k={want}: must be at least 1")
        return want, want
    depth = model.k
    want = depth if k is None else k
    if not 1 <= want <= depth:
        raise ValueError(
            f"k={want} is not in 1..{depth}: the model's k={depth} is how many BM25 candidates "
            f"its probabilities are computed over (as in training); ask for at most {depth}, "
            "or retrain with a larger 'hunchwise train -k'"
        )
    return want, depth


def check_revealed(revealed: float | None, complete: bool) -> float | None:
    """The share revealed, checked: in (0, 1], and 1 (or not given) on a complete clue."""
    if revealed is None:
        return None
    if isinstance(revealed, bool) or not 0.0 < revealed <= 1.0:
        raise ValueError(f"revealed={revealed!r}: the share of the clue revealed must be in (0, 1]")
    if complete and revealed != 1.0:
        raise ValueError(
            f"revealed={revealed}: a complete clue is all revealed; send 1 or leave it out"
        )
    return float(revealed)


def _policy(model: ServedModel | None) -> CandidatePolicy:
    """The model's candidate sets; BM25's top k without a model."""
    return _BM25 if model is None else model.candidates


_BM25 = CandidatePolicy()


@functools.cache
def _builtins() -> FeatureRegistry:
    """The built-in registry for model-less calls, made once (ours: nobody can add to it)."""
    return default_registry()


def _features_of(
    model: ServedModel | None, registry: FeatureRegistry | None, cs: Any
) -> tuple[np.ndarray, list[str]]:
    if model is None:
        registry = registry if registry is not None else _builtins()
        names = registry.names
        return registry.matrix(cs, names), names
    x = model.registry.matrix(cs, model.code_features)
    if model.metadata.names:
        x = np.hstack([x, np.tile(model.metadata.row(cs.metadata), (len(cs), 1))])
    return x, model.feature_names


def _rank_hits(
    index: Index,
    model: ServedModel | None,
    clue: str,
    tokens: list[str],
    words: list[str],
    hits: list[Hit],
    dense: DenseInfo | None,
    *,
    keep: int,
    set_k: int | None,
    payoff: Payoff | None,
    complete: bool,
    revealed: float | None,
    include_features: bool,
    metadata: dict[str, Any] | None,
    registry: FeatureRegistry | None,
    where: dict[str, Any] | None = None,
    snippets: bool = False,
) -> Ranking:
    cs = candidate_set(index, clue, hits, metadata, tokens, words, dense)
    probs: list[float] | None = None
    pointwise: list[float] | None = None
    among: float | None = None
    x, names = np.zeros((len(hits), 0)), list[str]()
    if model is not None or include_features:
        x, names = _features_of(model, registry, cs)
    if model is not None and hits:
        p = model.probability(x)
        q, among = model.distribution(p, cs.scores, len(words))
        probs, pointwise = q.tolist(), p.tolist()
        # q is p times one positive factor, so ranking by p ranks by q, without q's rounding.
        order = np.argsort(-p, kind="stable").tolist()
    else:
        order = list(range(len(hits)))
        if model is not None:
            among = 0.0  # no candidate at all: the answer is certainly not among them
    # Features and probabilities are over the whole set; only the reply is cut to k.
    order = order[:keep]
    qualifiers = cs.qualifiers
    values = x[order].tolist() if include_features else None
    cands = [
        ScoredCandidate(
            hits[i].doc_id,
            hits[i].title,
            qualifiers[i],
            float(hits[i].score),
            hits[i].rank,
            None if probs is None else probs[i],
            dict(zip(names, values[j], strict=True)) if values is not None else {},
            None if pointwise is None else pointwise[i],
            snippet(index.text_of(hits[i].row), index.analyzer, tokens) if snippets else None,
        )
        for j, i in enumerate(order)
    ]
    schedule = None if model is None else model.schedule
    threshold, basis, why = choose_threshold(
        payoff, schedule, None if model is None else model.threshold, revealed
    )
    top = cands[0] if cands else None
    decision = decide(
        top.doc_id if top else None,
        top.probability if top else None,
        threshold,
        complete=complete,
        basis=basis,
        why=why,
        none_of_these=None if among is None else 1.0 - among,
        none_abstain=None if schedule is None or payoff is not None else schedule.none_abstain,
    )
    return Ranking(
        clue=clue,
        candidates=cands,
        decision=decision,
        model_version=None if model is None else model.version,
        index_version=index.version,
        n_tokens=len(cs.tokens),
        k=keep,
        model_k=set_k,
        in_candidates=among,
        where=where,
    )


def rank_clue(
    index: Index,
    model: ServedModel | None,
    clue: str,
    *,
    k: int | None = None,
    payoff: Payoff | None = None,
    complete: bool = False,
    revealed: float | None = None,
    include_features: bool = False,
    metadata: dict[str, Any] | None = None,
    registry: FeatureRegistry | None = None,
    where: Mapping[str, Any] | None = None,
    snippets: bool = False,
) -> Ranking:
    """Rank one clue's candidates by calibrated probability (by BM25 when there is no model).

    With a model, the probabilities are computed over the model's own k candidates (what it
    was trained on) and the reply is the best `k` of them; k defaults to the model's and
    may not exceed it (ValueError). Without a model, k BM25 candidates (default 20).
    revealed: the share of the whole clue these words are, in (0, 1]; it picks the model's
    threshold for that share (the whole-clue one when not given).
    where: a metadata filter (retriever/metafilter.py): candidates come only from the
    articles it keeps, and features and probabilities are computed over those alone.
    snippets: give each candidate a passage of its text around the clue's words.
    """
    [ranking] = rank_clues(
        index,
        model,
        [clue],
        k=k,
        payoff=payoff,
        complete=complete,
        revealed=revealed,
        include_features=include_features,
        metadata=[metadata],
        registry=registry,
        where=where,
        snippets=snippets,
    )
    return ranking


def rank_clues(
    index: Index,
    model: ServedModel | None,
    clues: Sequence[str],
    *,
    k: int | None = None,
    payoff: Payoff | None = None,
    complete: bool = False,
    revealed: float | None = None,
    include_features: bool = False,
    metadata: Sequence[dict[str, Any] | None] | None = None,
    registry: FeatureRegistry | None = None,
    where: Mapping[str, Any] | None = None,
    snippets: bool = False,
    threads: int | None = None,
) -> list[Ranking]:
    """`rank_clue` for many clues (each clue analyzed once, as in Index.search_many);
    `metadata`, when given, holds one clue's metadata (or None) per clue; `where` filters
    the candidates of every clue.

    threads: how many threads share a batch (None: up to the cores, for batches of 64
    clues or more); the search kernel releases the GIL, so they overlap there. The
    rankings are the same whatever the count.
    """
    keep, depth = _ks(model, k)
    revealed = check_revealed(revealed, complete)
    if metadata is not None and len(metadata) != len(clues):
        raise ValueError(f"metadata holds {len(metadata)} items for {len(clues)} clues")
    metas = list(metadata) if metadata is not None else [None] * len(clues)
    n_threads = batch_threads(len(clues), threads)
    if n_threads > 1:

        def part(at: slice) -> list[Ranking]:
            return rank_clues(
                index, model, clues[at], k=k, payoff=payoff, complete=complete,
                revealed=revealed, include_features=include_features, metadata=metas[at],
                registry=registry, where=where, snippets=snippets, threads=1,
            )  # fmt: skip

        return map_parts(part, len(clues), n_threads, "hunchwise-rank")
    # Analyzed once, for the search and the features (words: the clue-length features).
    analyzer = index.analyzer
    analyzed = [(analyzer.tokens(c), analyzer.words(c)) for c in clues]
    # The filter's row mask goes into the searches, so it acts before their top-k cuts.
    allowed = None if where is None else index.filter_mask(where)
    spec = None if where is None else dict(where)
    found = find_candidates(index, [t for t, _ in analyzed], depth, _policy(model), allowed)
    return [
        _rank_hits(
            index,
            model,
            c,
            t,
            w,
            hits,
            dense,
            keep=keep,
            set_k=None if model is None else depth,
            payoff=payoff,
            complete=complete,
            revealed=revealed,
            include_features=include_features,
            metadata=meta,
            registry=registry,
            where=spec,
            snippets=snippets,
        )
        for c, (t, w), (hits, dense), meta in zip(clues, analyzed, found, metas, strict=True)
    ]
