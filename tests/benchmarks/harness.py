"""What the benchmark scripts share: their parser, a measurement run in a fresh process, and
the invented corpus they generate."""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

from corpus_demo import generate_corpus


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


def child_output(module: str, args: list[str]) -> str:
    """Standard output of `python -m module args`: a step measured in a fresh process, so its
    time and peak memory are its own. A failure shows the child's error output."""
    done = subprocess.run(
        [sys.executable, "-m", module, *args], capture_output=True, text=True, check=False
    )
    if done.returncode != 0:
        raise RuntimeError(f"{module} {' '.join(args)} failed:\n{done.stderr[-2000:]}")
    return done.stdout


def child_json(module: str, args: list[str]) -> dict[str, Any]:
    """The JSON object on the last line a measuring child process printed."""
    result: dict[str, Any] = json.loads(child_output(module, args).strip().splitlines()[-1])
    return result


def demo_corpus(work: Path, articles: int, questions: int) -> Path:
    """work/data holding an invented corpus of `articles` and `questions` clues (seed 11),
    generated unless it is already there."""
    data = work / "data"
    if not (data / "articles.jsonl").exists():
        generate_corpus(data, n_articles=articles, n_questions=questions, seed=11)
    return data
