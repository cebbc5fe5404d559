"""Sub-command `rank`: rank one clue, or a file of clues, with a model and no server."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .console import check_k, show_progress
from .options import add_feature_option, add_index_option, unit_share
from .records import ClueIn, json_line, output_format, read_clues, write_rows

if TYPE_CHECKING:
    from reranker import ServedModel
    from retriever import Index

BATCH = 256  # clues per rank_clues call: one batch search each, and a steady progress bar


def register(sub: argparse._SubParsersAction) -> None:
    """Add the rank sub-command."""
    p = sub.add_parser(
        "rank", help="rank one clue or a file of clues with a model, without a server"
    )
    p.add_argument(
        "clue", nargs="?", default=None, help="clue text (quote it); or give --input instead"
    )
    add_index_option(p)
    p.add_argument(
        "--model", type=Path, required=True, help="model file written by 'hunchwise train'"
    )
    p.add_argument(
        "--input",
        type=Path,
        default=None,
        metavar="FILE",
        help="clues to rank: JSON Lines (clue, optional id and metadata) or .csv (a clue "
        "column, optional id and metadata columns, the metadata a JSON object)",
    )
    p.add_argument(
        "--output",
        type=Path,
        default=None,
        metavar="FILE",
        help="where results go, one per clue: .jsonl, or .parquet with pyarrow "
        "(default: stdout, JSON Lines)",
    )
    p.add_argument("-k", type=int, default=None, help="candidates per clue (default: the model's)")
    p.add_argument(
        "--revealed",
        type=unit_share,
        default=None,
        metavar="SHARE",
        help="share of each whole clue the text is, 0-1: picks the model's threshold for it",
    )
    p.add_argument(
        "--complete", action="store_true", help="the clues are finished (abstaining is allowed)"
    )
    p.add_argument(
        "--explain",
        action="store_true",
        help="add each candidate's explanation: every feature's value, scaled value and "
        "contribution to the logit",
    )
    add_feature_option(p, "user feature function the model was trained with (repeatable)")
    p.set_defaults(func=cmd_rank)


def _clues(args: argparse.Namespace) -> list[ClueIn]:
    if (args.clue is None) == (args.input is None):
        raise ValueError("give one clue as an argument or a file of clues with --input, not both")
    if args.input is not None:
        return read_clues(args.input)
    if not args.clue.strip():
        raise ValueError("the clue is empty")
    return [ClueIn("1", args.clue, None, 0)]


def results(
    index: Index,
    model: ServedModel,
    clues: list[ClueIn],
    args: argparse.Namespace,
    progress: bool = False,
) -> Iterator[dict[str, Any]]:
    """One result per clue, in order: the service's reply for one clue, its id as `id`."""
    from tqdm.auto import tqdm

    from api.replies import json_bytes, rank_result
    from reranker import rank_clues

    with tqdm(total=len(clues), unit=" clues", disable=not progress) as bar:
        for start in range(0, len(clues), BATCH):
            chunk = clues[start : start + BATCH]
            rankings = rank_clues(
                index,
                model,
                [c.clue for c in chunk],
                k=args.k,
                complete=args.complete,
                revealed=args.revealed,
                metadata=[c.metadata for c in chunk],
                include_features=True,  # the model's columns, which explanations read
            )
            for c, r in zip(chunk, rankings, strict=True):
                reply = rank_result(c.id, r, False, model if args.explain else None)
                # The service's JSON bytes, read back: the same shape and numbers.
                body = json.loads(json_bytes(reply))
                del body["request_id"]
                yield {
                    "id": c.id,
                    **body,
                    "k": r.k,
                    "model_k": r.model_k,
                    "complete": args.complete,
                    "revealed": args.revealed,
                    "model_version": r.model_version,
                    "index_version": r.index_version,
                }
            bar.update(len(chunk))


def cmd_rank(args: argparse.Namespace) -> int:
    """Rank the clues and write one JSON result per clue."""
    from reranker import load_model
    from retriever import load_index

    check_k(args.k)
    clues = _clues(args)
    fmt = "jsonl" if args.output is None else output_format(args.output, ("jsonl", "parquet"))
    index = load_index(args.index)
    model = load_model(args.model, index=index, user_features=args.feature)
    rows = results(index, model, clues, args, show_progress() and args.output is not None)
    if args.output is None:
        for row in rows:
            sys.stdout.write(json_line(row))
        return 0
    write_rows(args.output, rows, fmt)
    return 0
