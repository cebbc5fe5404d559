"""Benchmark: clue -> probabilities latency, and featurizing cost as a share of the BM25 query.

Not a test (no assertions on time). Run:
    python tests/benchmarks/bench_reranker.py --articles 100000
It generates an invented corpus of that size with corpus_demo, builds the index, trains a
model on a sample of its clues, then times, per clue, (a) the BM25 query, (b) building the
candidate set + featurizing + scoring its 20 candidates, and (c) the whole rank_clue call.
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from pathlib import Path

from corpus_demo import generate_corpus
from reranker import load_model, rank_clue, train
from reranker.examples import candidate_set
from retriever import build_index


def _pct(values: list[float], q: float) -> float:
    values = sorted(values)
    return values[min(len(values) - 1, int(q * len(values)))]


def main() -> None:
    """Parse options, build everything in a temporary folder, print a markdown table."""
    ap = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    ap.add_argument("--articles", type=int, default=100_000, help="corpus size (default 100000)")
    ap.add_argument("--questions", type=int, default=2000, help="clues to generate (default 2000)")
    ap.add_argument("--queries", type=int, default=500, help="clues to time (default 500)")
    ap.add_argument("--k", type=int, default=20, help="candidates per clue (default 20)")
    ap.add_argument(
        "--work", type=Path, default=None, help="folder to keep the data in (default: temporary)"
    )
    args = ap.parse_args()

    with tempfile.TemporaryDirectory() as tmp:
        work = args.work or Path(tmp)
        data = work / "data"
        if not (data / "articles.jsonl").exists():
            generate_corpus(data, n_articles=args.articles, n_questions=args.questions, seed=11)
        t = time.perf_counter()
        index = build_index(data / "articles.jsonl", work / "index")
        build_s = time.perf_counter() - t
        t = time.perf_counter()
        train(index, [data / "questions_train.jsonl"], work / "model.json", k=args.k)
        train_s = time.perf_counter() - t
        model = load_model(work / "model.json", index=index)
        with open(data / "questions_test.jsonl", encoding="utf-8") as fh:
            clues = [json.loads(line)["clue"] for line in fh][: args.queries]
        for c in clues[:20]:  # warm caches and code paths
            rank_clue(index, model, c, k=args.k)
        q_ms, f_ms, e_ms = [], [], []
        for c in clues:
            t0 = time.perf_counter()
            hits = index.search(c, k=args.k)
            t1 = time.perf_counter()
            cs = candidate_set(index, c, hits)
            x = model.registry_.matrix(cs, model.code_features_)
            model.probability(x)
            t2 = time.perf_counter()
            rank_clue(index, model, c, k=args.k)
            t3 = time.perf_counter()
            q_ms.append((t1 - t0) * 1e3)
            f_ms.append((t2 - t1) * 1e3)
            e_ms.append((t3 - t2) * 1e3)
    rows = [
        ("BM25 query (top-20)", q_ms),
        ("features + probabilities", f_ms),
        ("rank_clue end to end", e_ms),
    ]
    print(
        f"\n{args.articles} articles, {len(clues)} clues, k={args.k}; "
        f"build {build_s:.1f} s, train {train_s:.1f} s\n"
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
