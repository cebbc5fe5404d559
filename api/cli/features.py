"""Sub-command `features export`: the training table `train` learns from, as a file."""

from __future__ import annotations

import argparse
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .console import check_k, print_json, show_progress, warn
from .options import (
    add_feature_option,
    add_index_option,
    add_log_option,
    add_prefix_options,
    add_ray_option,
    add_reporting_options,
)
from .records import output_format, plain, write_rows

if TYPE_CHECKING:
    from reranker.training import TrainingTable
    from retriever import Index

# The columns before the features, in order; README documents them as stable.
ROW_COLUMNS = (
    "clue_id",
    "file",
    "line",
    "prefix_share",
    "prefix_words",
    "prefix",
    "candidate_id",
    "label",
)


def register(sub: argparse._SubParsersAction) -> None:
    """Add the features group and its export sub-command."""
    group = sub.add_parser("features", help="feature tables for analysis outside hunchwise")
    fsub = group.add_subparsers(dest="features_command", metavar="COMMAND", required=True)
    p = fsub.add_parser(
        "export",
        help="write the training table (one row per clue prefix and candidate) to a file",
    )
    add_index_option(p)
    add_log_option(p)
    p.add_argument(
        "--out",
        type=Path,
        required=True,
        help="file to write: .jsonl, .csv, or .parquet with pyarrow",
    )
    p.add_argument(
        "--model",
        type=Path,
        default=None,
        help="take the features, k, candidate sets and prefixes from this model, so the rows "
        "hold what it reads (default: every built-in feature over BM25's top k)",
    )
    p.add_argument(
        "-k", type=int, default=None, help="candidates per prefix (default 20, or the model's)"
    )
    add_prefix_options(
        p,
        "shares of each clue's words that become rows (default 0.2,0.4,0.6,0.8,1, or the model's)",
    )
    add_feature_option(p, "register a user-defined feature function (repeatable)")
    add_ray_option(p, "build the table in blocks of clue prefixes")
    add_reporting_options(p, "the summary")
    p.set_defaults(func=cmd_export)


def table_rows(index: Index, table: TrainingTable) -> Iterator[dict[str, Any]]:
    """The table's rows as records: ROW_COLUMNS, then every feature column by name."""
    clash = [n for n in table.feature_names if n in ROW_COLUMNS]
    if clash:
        raise ValueError(f"feature names {clash} clash with the table's own columns; rename them")
    names = table.feature_names
    for i in range(table.y.size):
        clue = table.clues[int(table.clue_id[i])]
        record: dict[str, Any] = {
            "clue_id": int(table.clue_id[i]),
            "file": clue.file,
            "line": clue.line,
            "prefix_share": float(table.fraction[i]),
            "prefix_words": int(table.words[i]),
            "prefix": table.texts[int(table.group[i])],
            "candidate_id": index.ids[int(table.row[i])],
            "label": int(table.y[i]),
        }
        record.update(zip(names, map(plain, table.X[i].tolist()), strict=True))
        yield record


def cmd_export(args: argparse.Namespace) -> int:
    """Build the training table from the logs and write it."""
    from reranker import load_model
    from reranker.candidates import CandidatePolicy
    from reranker.features import MetadataColumns
    from reranker.features.builtin import DENSE, default_registry
    from reranker.training import PrefixPlan, build_table, read_logs
    from reranker.training.logs import LogReport
    from retriever.cluster import Runner
    from retriever.shardview import open_whole

    check_k(args.k)
    fmt = output_format(args.out, ("jsonl", "csv", "parquet"))
    index = open_whole(args.index)
    fractions, every = args.prefixes, args.every_words
    if args.model is not None:
        model = load_model(args.model, index=index, user_features=args.feature)
        if args.k is not None and args.k != model.k:
            raise ValueError(
                f"-k {args.k}: the model's features are computed over its k={model.k} "
                "candidates; leave -k out"
            )
        registry, names, k = model.registry, list(model.code_features), model.k
        metadata, policy = model.metadata, model.candidates
        trained = (model.artifact.get("training") or {}).get("prefix_plan") or {}
        if fractions is None and every is None:
            fractions, every = trained.get("fractions"), trained.get("every_words")
    else:
        registry = default_registry().with_user_features(args.feature)
        names = [n for n in registry.names if registry[n].group != DENSE]
        k, metadata, policy = args.k or 20, MetadataColumns(), CandidatePolicy()
    plan = PrefixPlan(tuple(fractions or PrefixPlan().fractions), every)
    report = LogReport()
    clues = read_logs(args.log, skip_bad=args.skip_bad, report=report)
    with Runner(args.ray, "export") as runner:
        table = build_table(
            index,
            clues,
            registry,
            names,
            k=k,
            plan=plan,
            metadata=metadata,
            candidates=policy,
            progress=show_progress(args.json),
            runner=runner,
        )
    n = write_rows(args.out, table_rows(index, table), fmt)
    if table.unresolved:
        warn(f"{len(table.unresolved)} gold answers matched no article; their clues are left out")
    summary = {
        "out": str(args.out),
        "rows": n,
        "clues": table.n_clues,
        "prefixes": table.n_prefixes,
        "features": len(table.feature_names),
        "skipped_lines": report.skipped,
    }
    if args.json:
        print_json(summary)
    else:
        print(", ".join(f"{k2}: {v}" for k2, v in summary.items()))
    return 0
