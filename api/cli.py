"""The `hunchwise` command: one sub-command per job, each a thin wrapper over the library."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence

from reranker.errors import RerankerError
from retriever.errors import RetrieverError

from . import cli_index
from .console import fail

# Each module adds its sub-commands; a sub-command stores its handler as `func`.
COMMAND_MODULES = [cli_index]


def _optional_modules() -> list[object]:
    mods: list[object] = []
    for name in ("cli_model", "cli_serve", "cli_demo"):
        try:
            mods.append(__import__(f"api.{name}", fromlist=["register"]))
        except ModuleNotFoundError as exc:
            if exc.name != f"api.{name}":
                raise
    return mods


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser (also used to render help text in the docs)."""
    parser = argparse.ArgumentParser(
        prog="hunchwise",
        description="Find the encyclopedia entry a clue describes: BM25 candidates, "
        "calibrated probabilities, and a JSON service.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for mod in [*COMMAND_MODULES, *_optional_modules()]:
        mod.register(sub)  # type: ignore[attr-defined]
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the console script; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    func: Callable[[argparse.Namespace], int] = args.func
    try:
        return func(args)
    except (RetrieverError, RerankerError, ValueError, OSError) as exc:
        return fail(str(exc))
    except KeyboardInterrupt:
        return fail("interrupted", 130)


if __name__ == "__main__":
    sys.exit(main())
