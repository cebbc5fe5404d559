"""Sub-command `rank`: rank one clue, or a file of clues, with a model and no server."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .console import check_k, show_progress
from .options import (
    add_feature_option,
    add_filter_option,
    add_index_option,
    add_model_option,
    add_ray_option,
    add_share_option,
)
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
    add_model_option(p)
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
    add_share_option(
        p,
        "--revealed",
        "share of each whole clue the text is, 0-1: picks the model's threshold for it",
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
    add_filter_option(p)
    p.add_argument(
        "--snippet",
        action="store_true",
        help="add each candidate's passage of text around the clue's words",
    )
    add_feature_option(p, "user feature function the model was trained with (repeatable)")
    add_ray_option(p, "with --input: rank blocks of clues")
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
                where=args.filter,
                snippets=args.snippet,
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
                    "filter": args.filter,
                    "model_version": r.model_version,
                    "index_version": r.index_version,
                }
            bar.update(len(chunk))


class RankWorker:
    """Ranks blocks of clues (a Ray Data worker): opens the index and model once, and gives
    each clue's result as the JSON line the in-process run writes."""

    def __init__(self, args: argparse.Namespace) -> None:
        from reranker import load_model
        from retriever.shardview import open_whole

        self.args = args
        self.index = open_whole(args.index)
        self.model = load_model(args.model, index=self.index, user_features=args.feature)

    def __call__(self, batch: dict[str, Any]) -> dict[str, Any]:
        import numpy as np

        clues = [
            ClueIn(str(i), str(c), json.loads(str(m)), int(n))
            for i, c, m, n in zip(
                batch["id"].tolist(),
                batch["clue"].tolist(),
                batch["meta"].tolist(),
                batch["line"].tolist(),
                strict=True,
            )
        ]
        lines = [json_line(row) for row in results(self.index, self.model, clues, self.args)]
        return {"seq": batch["seq"], "json": np.asarray(lines, dtype=object)}


def _distributed(args: argparse.Namespace, clues: list[ClueIn]) -> list[str]:
    """Every clue's JSON line, ranked in blocks by the workers of a Ray cluster, in order."""
    import numpy as np

    from retriever.cluster import Runner

    columns = {
        "seq": np.arange(len(clues), dtype=np.int64),
        "id": np.asarray([c.id for c in clues], dtype=object),
        "clue": np.asarray([c.clue for c in clues], dtype=object),
        "meta": np.asarray([json.dumps(c.metadata) for c in clues], dtype=object),
        "line": np.asarray([c.line for c in clues], dtype=np.int64),
    }
    # What a worker reads of the options (a Namespace of plain values crosses to the workers).
    passed = ("index", "model", "feature", "k", "complete", "revealed", "explain", "filter")
    worker_args = argparse.Namespace(**{k: getattr(args, k) for k in (*passed, "snippet")})
    with Runner(args.ray, "rank") as runner:
        out = runner.map_batches(columns, RankWorker, (worker_args,), BATCH)
    return [str(line) for line in out.get("json", [])]


def cmd_rank(args: argparse.Namespace) -> int:
    """Rank the clues and write one JSON result per clue."""
    from reranker import load_model
    from retriever.shardview import open_whole

    check_k(args.k)
    clues = _clues(args)
    fmt = "jsonl" if args.output is None else output_format(args.output, ("jsonl", "parquet"))
    if args.ray is not None:
        if args.input is None:
            raise ValueError("--ray ranks a file of clues: give --input FILE")
        lines = _distributed(args, clues)
        if args.output is None:
            sys.stdout.write("".join(lines))
        else:
            write_rows(args.output, (json.loads(line) for line in lines), fmt)
        return 0
    index = open_whole(args.index)
    model = load_model(args.model, index=index, user_features=args.feature)
    rows = results(index, model, clues, args, show_progress() and args.output is not None)
    if args.output is None:
        for row in rows:
            sys.stdout.write(json_line(row))
        return 0
    write_rows(args.output, rows, fmt)
    return 0
