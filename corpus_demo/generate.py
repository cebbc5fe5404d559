"""Command line entry point: python -m corpus_demo.generate --articles N --out DIR."""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

from corpus_demo.pipeline import (
    DEFAULT_ARTICLES,
    DEFAULT_DATA_DIR,
    DEFAULT_QUESTIONS,
    DEFAULT_SEED,
    generate_corpus,
)

__all__ = ["DEFAULT_DATA_DIR", "build_parser", "generate_corpus", "main"]


def build_parser() -> argparse.ArgumentParser:
    """Return the command-line parser."""
    p = argparse.ArgumentParser(
        prog="python -m corpus_demo.generate",
        description=(
            "Generate an invented encyclopedia (articles.jsonl) and clue questions "
            "with gold answers (questions_train.jsonl, questions_test.jsonl). "
            "Everything is fictional and the output depends only on the options: "
            "the same seed always gives byte-identical files."
        ),
    )
    options: tuple[tuple[str, type, object, str], ...] = (
        ("--articles", int, DEFAULT_ARTICLES, "number of articles to write (default "
         "%(default)s; 100000 or 1000000 for benchmarks)"),
        ("--questions", int, DEFAULT_QUESTIONS, "total number of questions, split about "
         "80/20 into train and test (default %(default)s)"),
        ("--seed", int, DEFAULT_SEED, "random seed (default %(default)s)"),
        ("--out", Path, DEFAULT_DATA_DIR, "output folder, created if missing (default: "
         "corpus_demo/data)"),
    )  # fmt: skip
    for flag, kind, default, text in options:
        p.add_argument(flag, type=kind, default=default, help=text)
    p.add_argument("--no-progress", action="store_true", help="never show the progress bar")
    return p


def main(argv: list[str] | None = None) -> int:
    """Run the generator from the command line."""
    args = build_parser().parse_args(argv)
    start = time.perf_counter()
    info = generate_corpus(
        args.out,
        n_articles=args.articles,
        n_questions=args.questions,
        seed=args.seed,
        progress=False if args.no_progress else None,
    )
    info["seconds"] = round(time.perf_counter() - start, 2)
    print(json.dumps(info, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
