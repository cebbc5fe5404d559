"""Train a reranker from labelled logs: table, fit, threshold, artifact."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from retriever import Index
from retriever.cluster import Runner
from retriever.shardview import ShardedView

from ..candidates import CandidatePolicy
from ..decision import Payoff, simulate_commits, tune_threshold
from ..features import FEATURE_SET_VERSION, FeatureRegistry, MetadataColumns
from ..features.builtin import DENSE, default_registry
from ..loading import ServedModel, serve
from ..model import save_model
from .comparisons import training_losses
from .estimator import Reranker
from .fusion import tune_fusion
from .logs import LogReport, read_logs
from .measures import candidate_metrics, clue_log_loss, clue_metrics
from .outofcore import SAMPLE_ROWS, fit_on_cluster
from .prefixrows import labelled_prefixes
from .presence import fit_presence
from .refine import Refined, refine_all
from .schedule import replay_rows, tune_schedule
from .table import PrefixPlan, TrainingTable, build_table


@dataclass
class TrainResult:
    """What training produced: the model ready to serve, the fitted estimator, the artifact,
    the table it learned from, and counts."""

    model: ServedModel
    estimator: Reranker
    artifact: dict[str, Any]
    table: TrainingTable
    log_report: LogReport
    # Held-out per-clue distribution of every table row (what the threshold was tuned on).
    oof_distribution: np.ndarray
    notes: list[str] = field(default_factory=list)
    # Comparisons the held-out figures lose (comparisons.training_losses), as sentences.
    warnings: list[str] = field(default_factory=list)


def top_of_groups(
    group: np.ndarray, prob: np.ndarray, y: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per group: (group id, top candidate's probability, whether the top candidate is right)."""
    idx = top_rows(group, prob)
    return group[idx], prob[idx], y[idx].astype(bool)


def top_rows(group: np.ndarray, prob: np.ndarray) -> np.ndarray:
    """Row of the most probable candidate of each group, in group order."""
    order = np.lexsort((-prob, group))
    g = group[order]
    return order[np.r_[True, g[1:] != g[:-1]]]


def prefix_tops(table: TrainingTable, prob: np.ndarray) -> dict[str, np.ndarray]:
    """Per clue prefix: clue id, fraction revealed, words read, top probability, top is right,
    and the "none of these" share (1 minus the prefix's candidates' probabilities)."""
    g, p, right = top_of_groups(table.group, prob, table.y)
    rows = np.searchsorted(table.group, g)  # groups are numbered in table order, so sorted
    among = np.add.reduceat(prob, rows) if rows.size else np.zeros(0)
    return {
        "group": g,
        "clue": table.clue_id[rows],
        "fraction": table.fraction[rows],
        "words": table.words[rows],
        "prob": p,
        "right": right,
        "none": np.clip(1.0 - among, 0.0, 1.0),
    }


def train(
    index: Index,
    logs: Sequence[str | Path],
    out: str | Path,
    *,
    k: int = 20,
    plan: PrefixPlan | None = None,
    features: Sequence[str] | None = None,
    user_features: Sequence[str] = (),
    metadata_features: Sequence[str] = (),
    calibration: str = "auto",
    payoff: Payoff | None = None,
    none_abstain: float | None = None,
    skip_bad: bool = False,
    progress: bool = False,
    registry: FeatureRegistry | None = None,
    candidates: str = "auto",
    runner: Runner | None = None,
    fit: str = "auto",
    fit_budget: int | None = None,
    refine_vectors: bool = True,
    sample_rows: int = SAMPLE_ROWS,
) -> TrainResult:
    """Read logs, build the training table, fit with grouped CV, tune the threshold, save JSON.

    candidates: "auto" makes hybrid candidate sets (BM25 + word vectors, the fusion weight
    chosen on these logs) when the index has word vectors, else BM25's; "bm25" always BM25's.
    runner: a Ray runner (retriever/cluster.py) that builds the training table in blocks.
    fit: 'memory' (scikit-learn), 'blocks' (the map-reduce fit, as `runner`'s tasks) or
    'auto' (in memory when the table, rows x features x 8 bytes, is under `fit_budget` bytes;
    None: a share of the memory available, blockfit.default_fit_budget; else in blocks). The
    model file's `fit` says which fit ran and why.
    With a Ray runner the table's rows stay on the cluster in blocks: over the budget (or
    with fit='blocks') the model is fitted from every row there, and the calibrator, the
    presence model, the thresholds and the held-out figures (and `TrainResult.table`) use
    a sample of whole clues of at most `sample_rows` rows (reranker/training/outofcore.py).
    refine_vectors: with hybrid candidates, train the vectors again with the labelled clues
    (reranker/training/refine.py; the rows cross-fitted, the served vectors refined on all).
    """
    if candidates not in ("auto", "bm25"):
        raise ValueError(f"candidates must be 'auto' or 'bm25', got {candidates!r}")
    if sample_rows < 1:
        raise ValueError(f"sample_rows must be at least 1, got {sample_rows}")
    sharded = isinstance(index, ShardedView)
    if candidates == "auto" and refine_vectors and sharded and index.dense is not None:
        # Refining writes a vector generation into the index folder (refine.py); a sharded
        # folder would need it in every shard, trained over all of them: not done yet.
        raise ValueError(
            f"{index.path}: refining the word vectors is not done on a sharded index; train "
            "with --no-refine-vectors (refine_vectors=False, the shards' own vectors) or "
            "--candidates bm25, or train on the unsharded index and copy its refined vectors "
            "into the shards with hunchwise index copy-vectors"
        )
    payoff = payoff or Payoff()
    plan = plan or PrefixPlan()
    reg = registry if registry is not None else default_registry().with_user_features(user_features)
    names = reg.expand(features) if features else list(reg.names)
    # Features named with --feature are always used, even when --features picks a subset.
    names += [n for n in reg.names if reg[n].group == "user" and n not in names]
    report = LogReport()
    clues = read_logs(logs, skip_bad=skip_bad, report=report)
    meta = (
        MetadataColumns.learn(clues, metadata_features) if metadata_features else MetadataColumns()
    )
    fusion_rows: list[dict[str, Any]] = []
    policy = CandidatePolicy()
    refined: Refined | None = None
    policy_for = None
    if candidates == "auto" and index.dense is not None:
        labelled = [c for c in clues if c.answer is not None]
        if refine_vectors and labelled:
            refined = refine_all(index, labelled, progress=progress)
            policy_for = refined.policy_for(CandidatePolicy("hybrid"))
        policy, fusion_rows = tune_fusion(
            index, clues, plan, k, progress=progress, policy_for=policy_for
        )
        if refined is not None:
            # The table's rows: the chosen weight, each clue with its other fold's vectors.
            policy_for = refined.policy_for(policy)
            policy = replace(policy, vectors=refined.served)
    if policy.mode == "bm25" and not features:
        # Without vectors the dense features are constant: leave them out of the model.
        names = [n for n in names if reg[n].group != DENSE]
    if runner is not None and runner.ray is not None:
        # The table's rows stay on the cluster until the fit is chosen; over the budget
        # the driver gathers only a bounded sample of clues (reranker/training/outofcore.py).
        pre = labelled_prefixes(index, clues, plan)
        own = None if policy_for is None else [policy_for(pre.kept[o[0]]) for o in pre.owners]
        on = fit_on_cluster(
            runner, index, pre, reg, names, k=k, metadata=meta, policy=policy, policies=own,
            calibration=calibration, progress=progress, fit=fit, fit_budget=fit_budget,
            sample_rows=sample_rows,
        )  # fmt: skip
        table, estimator, fit_record = on.table, on.estimator, on.record
        counts = (on.rows, on.positives, on.recall)
    else:
        table = build_table(
            index,
            clues,
            reg,
            names,
            k=k,
            plan=plan,
            metadata=meta,
            candidates=policy,
            progress=progress,
            runner=runner,
            policy_for=policy_for,
        )
        estimator = Reranker(
            calibration=calibration, verbose=progress, fit=fit, runner=runner, fit_budget=fit_budget
        ).fit(table.X, table.y, table.clue_id, table.feature_names)
        fit_record = {**estimator.fit_choice_.to_dict(), "driver_rows": int(table.y.size)}
        counts = (int(table.y.size), int(table.y.sum()), table.recall())
    # One distribution per clue: P(among the candidates) from clue-level evidence, shared out
    # in proportion to the pointwise probabilities. Decisions are tuned on that distribution.
    presence, q_oof = fit_presence(table, estimator.oof_proba_)
    tops = prefix_tops(table, q_oof)
    held_out = (tops["clue"], tops["fraction"], tops["prob"], tops["right"])
    tuned = tune_threshold(*held_out, payoff, words=tops["words"])
    at_break_even = simulate_commits(*held_out, payoff.break_even, payoff, words=tops["words"])
    schedule, rules = tune_schedule(replay_rows(tops), payoff, none_abstain=none_abstain)
    notes = []
    if table.unresolved:
        notes.append(
            f"{len(table.unresolved)} gold answers matched no article (listed in the artifact)"
        )
    oof = _oof_metrics(table, estimator.oof_proba_, q_oof)
    losses = training_losses(table, oof["clue"], oof["candidate"]["log_loss"])
    artifact = save_model(
        estimator.model_,
        out,
        feature_set_version=FEATURE_SET_VERSION,
        metadata_columns={
            "numeric": list(meta.numeric),
            "categorical": {k2: list(v) for k2, v in meta.categorical.items()},
        },
        user_features=list(user_features),
        index_version=index.version,
        training={
            "logs": [str(p) for p in logs],
            "checksum": report.checksum,
            "clues": table.n_clues,
            "prefixes": table.n_prefixes,
            "rows": counts[0],
            "positives": counts[1],
            "k": k,
            "prefix_plan": {"fractions": list(plan.fractions), "every_words": plan.every_words},
            "recall_at_k_full_clue": counts[2],
            "unresolved_answers": table.unresolved[:50],
            "unresolved_count": len(table.unresolved),
            "skipped_lines": report.skipped,
            "torn_lines": report.torn_lines,
            "served_without_feedback": report.served_without_feedback,
            "fusion_tuning": fusion_rows,
            "refined_vectors": None if refined is None else refined.summary(),
        },
        presence=presence.to_dict(),
        candidates=policy.to_dict(),
        fit=fit_record,
        metrics=oof,
        decision={
            "threshold": tuned["threshold"],
            "break_even": payoff.break_even,
            "payoff": payoff.to_dict(),
            "tuned_on_held_out": tuned,
            "at_break_even": at_break_even,
            # One threshold per share revealed (serving picks by the request's share), and
            # the three rules' figures on the same cross-fitted held-out prefixes.
            "schedule": schedule.to_dict(),
            "wait_threshold": rules["whole_clue"]["threshold"],
            "rules": rules,
        },
    )
    # Ready to serve as load_model would leave it, so rank_clue and evaluate take it directly.
    served = serve(estimator.model_, reg, source=str(out))
    messages = [w["message"] for w in losses]
    return TrainResult(served, estimator, artifact, table, report, q_oof, notes, messages)


def _oof_metrics(table: TrainingTable, oof: np.ndarray, q_oof: np.ndarray) -> dict[str, Any]:
    """Cross-validated (out-of-fold) figures of the training data, stored in the artifact.

    Candidate figures are of the pointwise probabilities; clue figures of the per-clue
    distribution, with the pointwise probabilities' clue-level log-loss beside them.
    """
    full = table.fraction == 1.0
    clue = clue_metrics(table.group[full], table.y[full], q_oof[full], table.score[full])
    clue.pop("top_candidate_reliability", None)
    clue["clue_log_loss_pointwise"] = clue_log_loss(table.group[full], table.y[full], oof[full])
    return {"out_of_fold": True, "candidate": candidate_metrics(table.y, oof), "clue": clue}
