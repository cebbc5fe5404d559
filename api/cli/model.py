"""Sub-commands `train` and `evaluate`."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from reranker import Payoff

from .console import check_k, format_table, print_json, show_progress, warn
from .options import (
    add_ablation_option,
    add_feature_option,
    add_index_option,
    add_log_option,
    add_model_option,
    add_prefix_options,
    add_ray_option,
    add_reporting_options,
    add_share_option,
    at_least_zero,
    byte_size,
    positive_int,
)


def _common(p: argparse.ArgumentParser) -> None:
    add_index_option(p)
    add_log_option(p)
    p.add_argument(
        "-k",
        type=int,
        default=None,
        help="candidates per clue (train: default 20, kept in the model; "
        "evaluate: only the model's)",
    )
    add_feature_option(p, "register a user-defined feature function (repeatable)")
    add_ray_option(p, "build the feature table in blocks of clue prefixes")
    p.add_argument(
        "--reward", type=float, default=None, help="payoff of a right answer (default 1)"
    )
    p.add_argument("--penalty", type=float, default=None, help="cost of a wrong answer (default 1)")
    add_share_option(
        p,
        "--reward-fall",
        "share of the reward lost by waiting for the whole clue, 0-1: a right answer after "
        "share s of the clue earns reward * (1 - SHARE * s) (default 0)",
    )
    p.add_argument(
        "--cost-per-word",
        type=at_least_zero,
        default=None,
        metavar="COST",
        help="taken off a right answer's reward per word read, never below 0 (default 0)",
    )
    add_reporting_options(p, "results")


def register(sub: argparse._SubParsersAction) -> None:
    """Add the train and evaluate sub-commands."""
    p = sub.add_parser("train", help="fit the reranker on labelled logs and write a JSON model")
    _common(p)
    p.add_argument("--out", type=Path, required=True, help="model file to write (JSON)")
    add_prefix_options(
        p, "shares of each clue's words that become examples (default 0.2,0.4,0.6,0.8,1)"
    )
    p.add_argument(
        "--features",
        default=None,
        metavar="NAME,NAME,...",
        help="use only these features or feature groups, e.g. 'retrieval,overlap,log_inlinks' "
        "(groups as in the ablation table; default: all built-in plus --feature ones)",
    )
    p.add_argument(
        "--candidates",
        choices=("auto", "bm25"),
        default="auto",
        help="auto (default): hybrid candidate sets (BM25 + word vectors, the fusion weight "
        "chosen on the logs) when the index has word vectors; bm25: BM25's top k only",
    )
    p.add_argument(
        "--no-refine-vectors",
        dest="refine_vectors",
        action="store_false",
        help="with hybrid candidates, use the index's own word vectors instead of training them "
        "again with the labelled clues and their answers (stored in the index folder)",
    )
    p.add_argument(
        "--meta-feature",
        action="append",
        default=[],
        metavar="FIELD",
        help="use a metadata field of the log as a feature (numbers as-is, text one-hot)",
    )
    p.add_argument(
        "--calibration",
        choices=["auto", "none", "platt", "isotonic"],
        default="auto",
        help="post-hoc calibration on held-out folds; auto keeps it only if log-loss improves",
    )
    add_share_option(
        p,
        "--abstain-if-none",
        "on a complete clue, abstain when the 'none of these' share is at least SHARE, 0-1 "
        "(default: never)",
    )
    p.add_argument(
        "--fit",
        choices=("auto", "memory", "blocks"),
        default="auto",
        help="how the logistic model is fitted: 'memory' (scikit-learn on the whole table), "
        "'blocks' (map-reduce Newton steps over blocks of rows, as Ray tasks with --ray; the "
        "same coefficients as the in-memory fit within a small tolerance, but with --ray the "
        "table is not gathered, so the calibration and thresholds are chosen on a sample of "
        "whole clues, see --sample-rows) or 'auto' (in memory when the table of features fits "
        "--fit-budget, else in blocks; default)",
    )
    p.add_argument(
        "--fit-budget",
        type=byte_size,
        default=None,
        metavar="SIZE",
        help="with --fit auto: the most memory the table of features (rows x features x 8 bytes) "
        "may take for the in-memory fit, like 512M or 2G (default: a quarter of the memory "
        "available when training starts)",
    )
    p.add_argument(
        "--sample-rows",
        type=positive_int,
        default=None,
        metavar="N",
        help="with --ray, when the table is not gathered: the most rows of the seeded sample "
        "of whole clues the calibration, thresholds and held-out figures are chosen on "
        "(default 100000; recorded in the model file's fit)",
    )
    p.set_defaults(func=cmd_train)

    p = sub.add_parser("evaluate", help="score a model on held-out logs and write a report folder")
    _common(p)
    add_model_option(p)
    p.add_argument(
        "--report",
        type=Path,
        required=True,
        help="folder for metrics.json, PNG plots and report.html",
    )
    add_ablation_option(p)
    p.set_defaults(func=cmd_evaluate)


def _payoff(args: argparse.Namespace) -> Payoff | None:
    from reranker import Payoff

    given = (args.reward, args.penalty, args.reward_fall, args.cost_per_word)
    if all(v is None for v in given):
        return None
    return Payoff(
        args.reward if args.reward is not None else 1.0,
        args.penalty if args.penalty is not None else 1.0,
        args.reward_fall or 0.0,
        args.cost_per_word or 0.0,
    )


def _schedule_text(schedule: dict[str, Any]) -> str:
    lows = [0.0, *schedule["shares"][:-1]]
    parts = zip(lows, schedule["shares"], schedule["thresholds"], strict=True)
    return ", ".join(f"{a:.0%}-{b:.0%}: {t:.2f}" for a, b, t in parts)


def _rules_text(rules: dict[str, Any]) -> str:
    names = (("schedule", "per share"), ("one_threshold", "one"), ("whole_clue", "wait"))
    return ", ".join(f"{name} {rules[k]['mean_payoff']:.3f}" for k, name in names)


def _candidates_text(c: dict[str, object]) -> str:
    if c["mode"] == "bm25":
        return "BM25 top k"
    vectors = f"refined vectors {c['vectors']}" if c.get("vectors") else "word vectors"
    return f"hybrid: BM25 + {vectors}, weight {c['weight']}, pools of {c['pool']}"


def cmd_train(args: argparse.Namespace) -> int:
    """Train and save a model; print its headline numbers."""
    from reranker.training import PrefixPlan, train
    from retriever.cluster import Runner
    from retriever.shardview import open_whole

    check_k(args.k)
    if args.sample_rows is not None and args.ray is None:
        raise ValueError(
            "--sample-rows: the sample is taken only when the table stays on a Ray cluster; "
            "give --ray ADDRESS|local too, or leave --sample-rows out"
        )
    index = open_whole(args.index)
    features = [f.strip() for f in args.features.split(",") if f.strip()] if args.features else None
    with Runner(args.ray, "train") as runner:
        res = train(
            index,
            args.log,
            args.out,
            k=20 if args.k is None else args.k,
            plan=PrefixPlan(args.prefixes or PrefixPlan().fractions, args.every_words),
            features=features,
            user_features=args.feature,
            metadata_features=args.meta_feature,
            calibration=args.calibration,
            payoff=_payoff(args),
            none_abstain=args.abstain_if_none,
            skip_bad=args.skip_bad,
            progress=show_progress(args.json),
            candidates=args.candidates,
            runner=runner,
            fit=args.fit,
            fit_budget=args.fit_budget,
            refine_vectors=args.refine_vectors,
            **({} if args.sample_rows is None else {"sample_rows": args.sample_rows}),
        )
    a = res.artifact
    summary = {
        "model": str(args.out),
        "model_version": a["model_version"],
        "features": len(a["feature_names"]),
        "clues": a["training"]["clues"],
        "rows": a["training"]["rows"],
        "C": a["C"],
        "cv_log_loss": min(a["cv_log_loss"].values()),
        "calibration": a["calibration"]["method"],
        "threshold": a["decision"]["threshold"],
        "thresholds_by_share": _schedule_text(a["decision"]["schedule"]),
        "mean_payoff_held_out": _rules_text(a["decision"]["rules"]),
        "candidates": _candidates_text(a["candidates"]),
        "fit": f"{a['fit']['method']}: {a['fit']['reason']}",
        "recall_at_k": a["training"]["recall_at_k_full_clue"],
        "unresolved_answers": a["training"]["unresolved_count"],
        "skipped_lines": a["training"]["skipped_lines"],
        "unfinished_last_lines": a["training"]["torn_lines"],
        "warnings": res.warnings,
    }
    for message in res.warnings:
        warn(message)
    if args.json:
        print_json(summary)
        return 0
    shown = {k: v for k, v in summary.items() if k != "warnings"}
    print(format_table(["", "value"], [(k, v) for k, v in shown.items()]))
    tuning = a["training"]["fusion_tuning"]
    if tuning:
        print(
            "\nfusion weight (BM25's share), chosen by recall@k on whole clues; BM25's order"
            " (1.0) kept unless the choice also gains when each half of the clues uses the"
            " weight the other half chose:"
        )
        print(
            format_table(
                ["weight", "recall@k", "recall@k, whole clues", "", "out of sample"],
                [
                    (
                        r["weight"],
                        round(r["recall_at_k"], 3),
                        round(r["recall_at_k_full_clue"], 3),
                        "chosen" if r["chosen"] else "",
                        _held_out(r),
                    )
                    for r in tuning
                ],
            )
        )
    for note in res.notes:
        print(f"note: {note}")
    return 0


def _held_out(row: dict[str, Any]) -> str:
    """BM25's row: whole-clue recall when each half uses the weight the other half chose."""
    held = row.get("held_out")
    if not held:
        return ""
    weights = "/".join(f"{w:g}" for w in held["weights_by_fold"])
    return f"{held['recall_at_k_full_clue']:.3f} (w {weights})"


def cmd_evaluate(args: argparse.Namespace) -> int:
    """Evaluate a model and write the report folder."""
    from reranker import load_model
    from reranker.training import evaluate
    from retriever.cluster import Runner
    from retriever.shardview import open_whole

    check_k(args.k)
    index = open_whole(args.index)
    model = load_model(args.model, index=index, user_features=args.feature)
    with Runner(args.ray, "evaluate") as runner:
        ev = evaluate(
            index,
            model,
            args.log,
            args.report,
            k=args.k,
            payoff=_payoff(args),
            run_ablation=not args.no_ablation,
            skip_bad=args.skip_bad,
            progress=show_progress(args.json),
            runner=runner,
        )
    for message in ev.warnings:
        warn(message)
    if args.json:
        print_json(
            {"metrics": ev.metrics, "ablation": ev.ablation, "report": str(ev.paths.get("report"))}
        )
        return 0
    print(ev.summary)
    print(f"\nreport: {ev.paths.get('report')}")
    return 0
