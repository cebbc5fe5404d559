"""`hunchwise index copy-vectors`: a model's refined word vectors into a sharded index."""

from __future__ import annotations

import argparse
from pathlib import Path

from .console import print_json, show_progress


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The sub-command's options."""
    p.add_argument("source", type=Path, help="the unsharded index folder the model was trained on")
    p.add_argument("sharded", type=Path, help="the sharded index folder (index build --shards)")
    p.add_argument(
        "--generation",
        action="append",
        metavar="NAME",
        help="a vector generation to copy (the model's candidates.vectors; repeatable; "
        "default: every generation of the source)",
    )
    p.add_argument("--json", action="store_true", help="print the summary as JSON")


def cmd_copy_vectors(args: argparse.Namespace) -> int:
    """Copy vector generations into every shard."""
    from retriever.shardvectors import copy_generations

    names = copy_generations(
        args.source, args.sharded, args.generation, progress=show_progress(args.json)
    )
    if args.json:
        print_json({"generations": names, "sharded": str(args.sharded)})
    else:
        listed = ", ".join(names) or "none (the source has no vector generation)"
        print(f"copied into every shard of {args.sharded}: {listed}")
    return 0
