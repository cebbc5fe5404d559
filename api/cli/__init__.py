"""The `hunchwise` command: one sub-command per job, each a thin wrapper over the library."""

from __future__ import annotations

import argparse
from collections.abc import Callable, Sequence

from . import demo, features, index, model, rank, serve
from .console import fail

# Each module adds its sub-commands; a sub-command stores its handler as `func`. The modules
# import the heavy libraries inside their handlers, so `hunchwise --help` answers at once.
COMMAND_MODULES = [index, model, rank, features, serve, demo]


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("hunchwise")
    except PackageNotFoundError:  # running from a source tree that was never installed
        return "unknown (not installed)"


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser (also used to render help text in the docs)."""
    parser = argparse.ArgumentParser(
        prog="hunchwise",
        description="Find the encyclopedia entry a clue describes: BM25 candidates, "
        "calibrated probabilities, and a JSON service.",
    )
    parser.add_argument(
        "--version", action="version", version=f"%(prog)s {_version()}", help="print the version"
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for mod in COMMAND_MODULES:
        mod.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the console script; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    func: Callable[[argparse.Namespace], int] = args.func
    try:
        return func(args)
    except KeyboardInterrupt:
        return fail("interrupted", 130)
    except Exception as exc:
        from reranker.errors import RerankerError
        from retriever.errors import RetrieverError

        if isinstance(exc, RetrieverError | RerankerError | ValueError | OSError):
            return fail(str(exc))
        raise
