"""Benchmark: clue -> probabilities latency, and featurizing cost as a share of the BM25 query.

Not a test (no assertions on time). Run:
    python -m tests.benchmarks.bench_reranker --articles 100000
It generates an invented corpus of that size with corpus_demo, builds the index, trains a
model on a sample of its clues, then times, per clue, the steps of rank_clue one by one:
(a) analyzing the clue (its tokens and words, once) and the BM25 query, (b) building the
candidate set from the hits, (c) the feature matrix, (d) the model's probabilities, and then
(e) the whole rank_clue call, which also builds the served candidates and the decision.

The timing runs in a fresh process that opens the index and model from disk and freezes
what it loaded out of the garbage collector's way, as a server does. Per-row name tokens
are analyzed the first time a row is among the candidates, so the timed pass runs after
one pass over the same clues (a server that has seen its rows); that first pass is
reported as "rows first seen".
"""

from __future__ import annotations

import argparse
import gc
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from reranker import load_model, rank_clue
from reranker.features import candidate_set
from reranker.training import train
from retriever import build_index, load_index
from tests.benchmarks.harness import bench_parser, demo_corpus


def _pct(values: list[float], q: float) -> float:
    values = sorted(values)
    return values[min(len(values) - 1, int(q * len(values)))]


def main() -> None:
    """Parse options, build everything in a temporary folder, print a markdown table."""
    ap = bench_parser(__doc__, queries=500, per="candidates per clue")
    ap.add_argument("--questions", type=int, default=2000, help="clues to generate (default 2000)")
    ap.add_argument(
        "--work", type=Path, default=None, help="folder to keep the data in (default: temporary)"
    )
    ap.add_argument("--measure", type=Path, default=None, help=argparse.SUPPRESS)  # the child
    args = ap.parse_args()
    if args.measure is not None:
        measure(args.measure, args.queries, args.k, args.articles)
        return

    with tempfile.TemporaryDirectory() as tmp:
        work = args.work or Path(tmp)
        data = demo_corpus(work, args.articles, args.questions)
        t = time.perf_counter()
        index = build_index(data / "articles.jsonl", work / "index")
        build_s = time.perf_counter() - t
        t = time.perf_counter()
        train(index, [data / "questions_train.jsonl"], work / "model.json", k=args.k)
        train_s = time.perf_counter() - t
        print(f"\nbuild {build_s:.1f} s, train {train_s:.1f} s")
        del index
        # Timed in a fresh process that opens the index and model from disk, as a server does
        # (the building and training above leave this process's memory in another state).
        options = ["--queries", str(args.queries), "--k", str(args.k)]
        options += ["--articles", str(args.articles), "--measure", str(work)]
        subprocess.run(
            [sys.executable, "-m", "tests.benchmarks.bench_reranker", *options], check=True
        )


def measure(work: Path, queries: int, k: int, articles: int) -> None:
    """Open the index and model in `work` and time the steps of rank_clue per held-out clue."""
    t = time.perf_counter()
    index = load_index(work / "index")
    model = load_model(work / "model.json", index=index)
    load_s = time.perf_counter() - t
    gc.collect()  # as the server does after start-up (api/app.py)
    gc.freeze()
    with open(work / "data" / "questions_test.jsonl", encoding="utf-8") as fh:
        clues = [json.loads(line)["clue"] for line in fh][:queries]
    t = time.perf_counter()
    rank_clue(index, model, clues[0], k=k)
    first_s = time.perf_counter() - t
    registry, names = model.registry, list(model.code_features)
    analyzer = index.analyzer

    def featurize(
        clue: str, tokens: list[str], words: list[str], hits: list[Any]
    ) -> tuple[float, float, float]:
        t1 = time.perf_counter()
        cs = candidate_set(index, clue, hits, tokens=tokens, words=words)
        t2 = time.perf_counter()
        x = registry.matrix(cs, names)
        t3 = time.perf_counter()
        model.probability(x)
        t4 = time.perf_counter()
        return t2 - t1, t3 - t2, t4 - t3

    first_ms = []  # rows first seen: the pass before the timed one
    for c in clues:
        tokens, words = analyzer.tokens(c), analyzer.words(c)
        hits = index.search_tokens(tokens, k)
        first_ms.append(sum(featurize(c, tokens, words, hits)) * 1e3)
        rank_clue(index, model, c, k=k)
    q_ms, c_ms, x_ms, p_ms, f_ms, e_ms = [], [], [], [], [], []
    for c in clues:
        t0 = time.perf_counter()
        tokens, words = analyzer.tokens(c), analyzer.words(c)
        hits = index.search_tokens(tokens, k)
        t1 = time.perf_counter()
        steps = featurize(c, tokens, words, hits)
        t2 = time.perf_counter()
        rank_clue(index, model, c, k=k)
        t3 = time.perf_counter()
        q_ms.append((t1 - t0) * 1e3)
        c_ms.append(steps[0] * 1e3)
        x_ms.append(steps[1] * 1e3)
        p_ms.append(steps[2] * 1e3)
        f_ms.append(sum(steps) * 1e3)
        e_ms.append((t3 - t2) * 1e3)
    rows = [
        ("analyze clue + BM25 query (top-20)", q_ms),
        ("candidate set", c_ms),
        ("feature matrix", x_ms),
        ("probabilities", p_ms),
        ("features + probabilities (the three above)", f_ms),
        ("features + probabilities, rows first seen", first_ms),
        ("rank_clue end to end", e_ms),
    ]
    print(
        f"{articles} articles, {len(clues)} clues, k={k}, {len(names)} features; fresh process: "
        f"open index + model {load_s:.2f} s, first rank_clue {first_s * 1e3:.1f} ms\n"
    )
    print("| step | p50 ms | p95 ms | mean ms |")
    print("|---|---|---|---|")
    for name, vals in rows:
        print(
            f"| {name} | {_pct(vals, 0.5):.3f} | {_pct(vals, 0.95):.3f} "
            f"| {statistics.fmean(vals):.3f} |"
        )
    share = statistics.fmean(f_ms) / statistics.fmean(q_ms)
    print(f"\nfeaturizing + scoring / BM25 query time (mean): {share:.2f}")


if __name__ == "__main__":
    main()
