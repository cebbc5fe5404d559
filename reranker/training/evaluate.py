"""Evaluate a model on labelled logs: clue and candidate metrics, decisions, feature ablation."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from sklearn.metrics import brier_score_loss, log_loss, roc_auc_score
from tqdm.auto import tqdm

from retriever import Index
from retriever.cluster import Runner

from ..decision import Payoff, simulate_commits
from ..features.builtin import SCORE_ONLY
from ..loading import ServedModel
from ..presence import distribute_groups
from . import measures as M
from .comparisons import about, baselines, fitting_notes, model_losses, same_logs_warning
from .estimator import Reranker
from .fitting import grouped_folds, oof_proba
from .logs import LogReport, read_logs
from .misses import worst_missed
from .report import summary_text, write_report
from .report_speed import speed_text
from .schedule import compare_rules, replay_rows
from .table import PrefixPlan, TrainingTable, build_table
from .train import prefix_tops, top_rows

GROUP_ORDER = (
    "retrieval",
    "length",
    "popularity",
    "qualifier",
    "leakage",
    "overlap",
    "dense",
    "user",
    "metadata",
)


@dataclass
class Evaluation:
    """The outcome of an evaluation: metrics, ablation rows, report files, a text summary and
    the warnings (every comparison the model loses), also in metrics["warnings"]."""

    metrics: dict[str, Any]
    ablation: list[dict[str, Any]]
    paths: dict[str, Path]
    summary: str
    warnings: list[str] = field(default_factory=list)


def _score_row(
    name: str,
    kind: str,
    groups: Sequence[str],
    names: Sequence[str],
    table: TrainingTable,
    p: np.ndarray,
) -> dict[str, Any]:
    full = table.fraction == 1.0
    clue = M.clue_metrics(table.group[full], table.y[full], p[full], table.score[full])
    return {
        "name": name,
        "kind": kind,
        "groups": list(groups),
        "features": list(names),
        "log_loss": float(log_loss(table.y, p, labels=[0, 1])),
        "brier": float(brier_score_loss(table.y, p, labels=[0, 1])),
        "roc_auc": float(roc_auc_score(table.y, p)) if np.unique(table.y).size == 2 else None,
        "ece": M.expected_calibration_error(table.y, p),
        "top1": clue["top1_reranked"],
        "clue_log_loss": clue["clue_log_loss"],
        "top_candidate_ece": clue["top_candidate_ece"],
    }


def _columns(table: TrainingTable, names: Sequence[str]) -> np.ndarray:
    """Feature columns of the table; the BM25 score is there even when the model lacks it."""
    if all(n in table.feature_names for n in names):
        return table.columns(names)
    cols = [
        table.score
        if n not in table.feature_names and n in SCORE_ONLY
        else table.columns([n])[:, 0]
        for n in names
    ]
    return np.column_stack(cols)


def feature_groups(model: ServedModel) -> dict[str, list[str]]:
    """The model's features by ablation group, in a sensible order for forward additions."""
    by_group = model.registry.groups()
    out: dict[str, list[str]] = {}
    for name in model.feature_names:
        if name.startswith("meta:"):
            group = "metadata"
        else:
            group = next((g for g, names in by_group.items() if name in names), "user")
        out.setdefault(group, []).append(name)
    return {
        g: out[g]
        for g in sorted(out, key=lambda g: GROUP_ORDER.index(g) if g in GROUP_ORDER else 99)
    }


def ablation(
    table: TrainingTable,
    groups: dict[str, list[str]],
    C: float,
    n_folds: int = 5,
    progress: bool = False,
) -> list[dict[str, Any]]:
    """Baseline, each group alone, forward additions, drop-one and full, on one grouped CV.

    Each row names the feature groups it uses ("groups"; the baseline's is "bm25 score") and
    lists its features ("features").
    """
    splits = grouped_folds(table.y, table.clue_id, n_folds)
    full = [n for names in groups.values() for n in names]
    every = list(groups)
    plan: list[tuple[str, str, list[str], list[str]]] = [
        ("bm25 score only", "baseline", ["bm25 score"], list(SCORE_ONLY))
    ]
    plan += [(f"{g} alone", "alone", [g], names) for g, names in groups.items()]
    acc: list[str] = list(SCORE_ONLY)
    for i, (g, names) in enumerate(groups.items()):
        acc = acc + [n for n in names if n not in acc]
        plan.append((f"+ {g}", "forward", ["bm25 score", *every[: i + 1]], list(acc)))
    if len(groups) > 1:
        for g, names in groups.items():
            rest = [n for n in full if n not in names]
            plan.append((f"- {g}", "drop-one", [h for h in every if h != g], rest))
    plan.append(("full model", "full", every, full))
    rows = []
    for name, kind, used, names in tqdm(plan, desc="ablation", unit=" fits", disable=not progress):
        p = oof_proba(_columns(table, names), table.y, splits, C)
        rows.append(_score_row(name, kind, used, names, table, p))
    return rows


def evaluate(
    index: Index,
    model: ServedModel,
    logs: Sequence[str | Path],
    report_dir: str | Path,
    *,
    k: int | None = None,
    plan: PrefixPlan | None = None,
    payoff: Payoff | None = None,
    run_ablation: bool = True,
    n_folds: int = 5,
    skip_bad: bool = False,
    progress: bool = False,
    runner: Runner | None = None,
) -> Evaluation:
    """Score a trained model on held-out logs and write the report folder.

    runner: a Ray runner (retriever/cluster.py) that builds the evaluation table in blocks.

    The model is scored on candidate sets of its own k, the only ones its probabilities hold
    for; a different k is refused (ValueError) before anything is read or written.
    """
    art = model.artifact
    training = art.get("training", {})
    own_k = model.k
    if k is not None and k != own_k:
        raise ValueError(
            f"-k {k} does not match the model's k ({own_k}): its features compare each "
            f"candidate with its rivals among the top {own_k}, as in training, so it is "
            f"evaluated on sets of that size; leave -k out, or retrain with "
            f"'hunchwise train -k {k}' to evaluate at {k}"
        )
    k = own_k
    if Path(report_dir).exists() and not Path(report_dir).is_dir():
        # Said before the evaluation runs, not as an errno once it is done.
        raise NotADirectoryError(
            f"{report_dir} is a file, not a folder; the report is a folder (metrics.json, "
            "plots, report.html): choose a new name or an existing report folder"
        )
    if plan is None:
        pp = training.get("prefix_plan") or {}
        plan = PrefixPlan(tuple(pp.get("fractions", PrefixPlan().fractions)), pp.get("every_words"))
    decided = art.get("decision") or {}
    if payoff is None:  # the model's own payoff and its tuned thresholds
        pay = decided.get("payoff") or {}
        payoff = Payoff(**{k: float(pay.get(k, v)) for k, v in Payoff().to_dict().items()})
        threshold = model.threshold
        wait = float(decided.get("wait_threshold", threshold))
    else:  # a payoff given here is decided at its break-even point
        threshold = wait = payoff.break_even
    report = LogReport()
    clues = read_logs(logs, skip_bad=skip_bad, report=report)
    table = build_table(
        index,
        clues,
        model.registry,
        list(model.code_features),
        k=k,
        plan=plan,
        metadata=model.metadata,
        candidates=model.candidates,
        progress=progress,
        runner=runner,
    )
    if table.y.size == 0 or table.y.sum() == 0:
        raise ValueError(
            "the evaluation logs give no candidate rows with a right answer; "
            "check the answers resolve"
        )
    pointwise = model.probability(table.columns(model.feature_names))
    # The clue figures and decisions use each clue's distribution (candidates' shares of
    # P(among)); the candidate figures the pointwise probabilities, like the baselines'.
    prob, _ = distribute_groups(model.presence, table.group, pointwise, table.score, table.words)
    bm25_only = (
        Reranker(calibration="none", n_folds=n_folds)
        .fit(_columns(table, SCORE_ONLY), table.y, table.clue_id, list(SCORE_ONLY))
        .oof_proba_
    )
    full = table.fraction == 1.0
    clue = M.clue_metrics(table.group[full], table.y[full], prob[full], table.score[full])
    clue["clue_log_loss_pointwise"] = M.clue_log_loss(
        table.group[full], table.y[full], pointwise[full]
    )
    candidate = {
        "model": M.candidate_metrics(table.y, pointwise),
        "bm25_only": M.candidate_metrics(table.y, bm25_only),
        "all_wrong": M.baseline_all_wrong(table.y),
    }
    tops = prefix_tops(table, prob)
    commits = simulate_commits(
        tops["clue"], tops["fraction"], tops["prob"], tops["right"], threshold, payoff,
        words=tops["words"],
    )  # fmt: skip
    speed = compare_rules(
        replay_rows(tops), payoff, schedule=model.schedule, single=threshold, wait=wait
    )
    top_row = np.zeros(table.y.size, dtype=bool)
    top_row[top_rows(table.group, prob)] = True
    committed = top_row & (prob >= threshold)
    prefix_rows = M.by_prefix(table.fraction, table.group, table.y, prob, committed, payoff)
    metrics: dict[str, Any] = {
        "clue": clue,
        "candidate": candidate,
        "decision": {
            "threshold": threshold,
            "payoff": payoff.to_dict(),
            **commits,
        },
        "speed": speed,  # the schedule and two simple rules, under this payoff
        "data": {
            "logs": [str(p) for p in logs],
            "clues": table.n_clues,
            "prefixes": table.n_prefixes,
            "candidate_rows": int(table.y.size),
            "k": k,
            "model_version": model.version,
            "index_version": index.version,
            "unresolved_answers": len(table.unresolved),
            "skipped_lines": report.skipped,
            "torn_lines": report.torn_lines,  # unfinished last lines (a crash), skipped
            "note": "clue-level figures use the full clue; "
            "candidate-level figures use every prefix",
        },
    }
    groups = feature_groups(model)
    rows = ablation(table, groups, model.model.C_, n_folds, progress) if run_ablation else []
    notes = fitting_notes(n_folds=n_folds, C=model.model.C_, version=model.version)
    metrics["about"] = about(model, groups, metrics["data"], notes, n_folds)
    metrics["baselines"] = baselines(table, bm25_only, clue, candidate, notes)
    found = model_losses(metrics["baselines"], rows, n_clues=clue["n_clues"])
    same = same_logs_warning(str(training.get("checksum") or ""), report.checksum)
    metrics["warnings"] = ([same] if same else []) + found
    metrics["worst_missed"] = worst_missed(index, table, prob)
    reliability_candidate = M.reliability_table(table.y, pointwise)
    metrics["reliability"] = {
        "interval": "95% Wilson (1927) score interval of the share right in each bin",
        "top_candidate": clue["top_candidate_reliability"],
        "every_candidate": reliability_candidate,
    }
    inlinks = np.asarray(index.inlinks[table.row])
    paths = write_report(
        report_dir,
        metrics,
        reliability_candidate=reliability_candidate,
        reliability_top=clue["top_candidate_reliability"],
        prefix_rows=prefix_rows,
        ablation_rows=rows,
        inlinks=inlinks,
        labels=table.y,
        unresolved=table.unresolved,
    )
    summary = summary_text(metrics, rows) + "\n\n" + decision_text(metrics["decision"], prefix_rows)
    summary += "\n\n" + speed_text(speed)
    messages = [w["message"] for w in metrics["warnings"]]
    return Evaluation(metrics, rows, paths, summary, messages)


def _speed_terms(pay: dict[str, Any]) -> str:
    fall, cost = pay.get("reward_fall", 0.0), pay.get("cost_per_word", 0.0)
    out = f", reward falls {fall:.0%} across the clue" if fall else ""
    return out + (f", {cost:g} off a right answer per word read" if cost else "")


def decision_text(d: dict[str, Any], prefix_rows: list[dict[str, Any]]) -> str:
    """Terminal lines on answering early versus waiting for the whole clue."""
    pay = d["payoff"]
    lines = [
        f"decision (threshold {d['threshold']:.2f}, reward {pay['reward']:g}, "
        f"penalty {pay['penalty']:g}, abstain 0{_speed_terms(pay)})",
        f"  answer at the first prefix that clears it: commit rate {d['commit_rate']:.3f}, "
        f"accuracy {d['accuracy_when_committed']:.3f}, mean payoff {d['mean_payoff']:.3f}, "
        f"mean share of the clue seen {d['mean_fraction_at_commit']:.2f}",
        f"  the same threshold on whole clues only:   commit rate "
        f"{d['full_clue_commit_rate']:.3f}, mean payoff {d['full_clue_mean_payoff']:.3f}",
        "",
        "share seen  clues  top-1   commit  accuracy if committed  mean payoff",
    ]
    for r in prefix_rows:
        acc = r["accuracy_when_committed"]
        lines.append(
            f"{r['fraction']:>10.2f}  {r['n_clues']:>5}  {r['top1_accuracy']:.3f}   "
            f"{r['commit_rate']:.3f}   {'n/a' if acc is None else f'{acc:.3f}':>21}  "
            f"{r['mean_payoff']:>11.3f}"
        )
    return "\n".join(lines)
