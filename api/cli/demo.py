"""Sub-command `demo`: the whole job on the invented demo corpus, in one folder."""

from __future__ import annotations

import argparse
from pathlib import Path

from .options import add_ablation_option, add_port_option


def register(sub: argparse._SubParsersAction) -> None:
    """Add the demo sub-command."""
    p = sub.add_parser(
        "demo",
        help="index the demo corpus, train, evaluate, then serve it and send a sample clue",
        description="Runs the main job end to end on the invented corpus in corpus_demo/: "
        "builds the "
        "BM25 index, trains the reranker on the training clues, evaluates it on held-out clues "
        "(report with ablation and calibration), then starts the service on 127.0.0.1 and shows "
        "one request and its response.",
    )
    p.add_argument(
        "--out",
        type=Path,
        default=Path("hunchwise-demo"),
        help="folder for the index, model, report and served log (default ./hunchwise-demo)",
    )
    p.add_argument("--no-serve", action="store_true", help="stop after the evaluation report")
    add_port_option(p, " for the service")
    p.add_argument(
        "--articles",
        type=int,
        default=None,
        help="generate a fresh corpus of this many articles instead of the committed one",
    )
    add_ablation_option(p)
    p.set_defaults(func=cmd_demo)


def cmd_demo(args: argparse.Namespace) -> int:
    """Run the demo and say what to try next."""
    from .console import fail, show_progress, warn
    from .demo_steps import check_port, prepare, run_demo, serve_and_ask

    if not args.no_serve and args.port:
        check_port("127.0.0.1", args.port)  # before minutes of work, not after
    run = run_demo(
        args.out, articles=args.articles, ablation=not args.no_ablation, progress=show_progress()
    )
    print()
    print(run.summary)
    for w in run.metrics.get("warnings") or []:
        warn(w["message"])
    print(f"\neverything is in {run.out}:")
    print(
        f"  index   {run.index}\n  model   {run.model}\n"
        f"  report  {run.report}  (open it in a browser)"
    )
    if args.no_serve:
        print(
            f"\nnext: hunchwise serve --index {run.index} --model {run.model} "
            f"--log-dir {run.out / 'logs'}"
        )
        return 0
    serve_and_ask(
        run,
        prepare(run.out, articles=None) if args.articles is None else run.out / "data",
        port=args.port,
    )
    return (
        0
        if run.server_exit in (None, 0)
        else fail(f"the service stopped with exit status {run.server_exit}", run.server_exit)
    )
