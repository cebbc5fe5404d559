"""The options every corpus-size benchmark takes, in one place."""

from __future__ import annotations

import argparse


def bench_parser(
    doc: str | None,
    *,
    articles: int = 100_000,
    queries: int = 300,
    k: int = 20,
    per: str = "results per search",
) -> argparse.ArgumentParser:
    """A parser showing the script's docstring, with --articles, --queries and --k."""
    ap = argparse.ArgumentParser(
        description=doc, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    ap.add_argument(
        "--articles", type=int, default=articles, help=f"corpus size (default {articles})"
    )
    ap.add_argument(
        "--queries", type=int, default=queries, help=f"clues to time (default {queries})"
    )
    ap.add_argument("--k", type=int, default=k, help=f"{per} (default {k})")
    return ap
