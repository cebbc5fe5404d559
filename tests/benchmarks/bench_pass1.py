"""Benchmark: pass 1 of a sharded build as a Ray Data job, as plain Ray tasks, and here.

Not a test (no assertions on time). Run:
    python -m tests.benchmarks.bench_pass1 --articles 20000 --shards 4
It generates an invented corpus of that size with corpus_demo and starts one local Ray
cluster, then counts the shards' ranges (retriever/shardcount.py) `--repeats` times each
way, in turns: the Ray Data job `hunchwise index build --ray` runs (the ranges a dataset,
one `CountRanges` worker per CPU, each started per job), the same counting as one Ray task
per range (`Runner.map`, what pass 1 was before), and one range after the other in this
process. Prints the median seconds and the ratios against the Ray tasks of this run; the
first round of each is left out (workers warming up).
"""

from __future__ import annotations

import os
import statistics
import tempfile
import time
from pathlib import Path

from retriever.analyzer import AnalyzerConfig
from retriever.cluster import Runner
from retriever.ingest import item_offsets
from retriever.shardcount import _windows, count_ranges, count_shard, split_items
from tests.benchmarks.harness import bench_parser, demo_corpus


def main() -> None:
    """Parse options, generate the corpus in a temporary folder, print a markdown table."""
    ap = bench_parser(__doc__, articles=20_000)
    ap.add_argument("--shards", type=int, default=4, help="ranges to count (default 4)")
    ap.add_argument("--repeats", type=int, default=4, help="rounds of each way (default 4)")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        corpus = str(demo_corpus(Path(tmp), args.articles, 50) / "articles.jsonl")
        offsets = item_offsets(Path(corpus))
        assert offsets is not None
        spans = split_items(offsets[0].size - 1, args.shards)
        windows = _windows(offsets, spans)
        analyzer = AnalyzerConfig().to_dict()
        calls = [(corpus, s, analyzer, False, w) for s, w in zip(spans, windows, strict=True)]
        seconds: dict[str, list[float]] = {"ray data": [], "ray tasks": [], "in-process": []}
        with Runner("local", "benchmark") as ray, Runner(None) as here:
            ways = {
                "ray data": lambda: count_ranges(ray, corpus, spans, windows, analyzer, False),
                "ray tasks": lambda: ray.map(count_shard, calls),
                "in-process": lambda: count_ranges(here, corpus, spans, windows, analyzer, False),
            }
            for _ in range(args.repeats + 1):
                for name, run in ways.items():
                    started = time.perf_counter()
                    run()
                    seconds[name].append(time.perf_counter() - started)
        load = os.getloadavg()[0]
    base = statistics.median(seconds["ray tasks"][1:])
    print(
        f"\npass 1, {args.articles:,} articles in {args.shards} ranges, "
        f"{args.repeats} rounds (load average {load:.1f} on {os.cpu_count()} CPUs)\n"
    )
    print("| way | median s | vs Ray tasks |")
    print("| --- | --- | --- |")
    for name, values in seconds.items():
        median = statistics.median(values[1:])
        print(f"| {name} | {median:.2f} | x{median / base:.2f} |")


if __name__ == "__main__":
    main()
