"""Benchmark: the driver's memory of `hunchwise train --ray local`, table gathered or not.

Not a test (no assertions). Run:
    python -m tests.benchmarks.bench_outofcore --articles 3000 --questions 6000
It generates an invented corpus with corpus_demo (about 80% of the questions become
labelled training clues), builds a BM25 index (no word vectors, BM25 candidates: the
table's rows depend on nothing random), then runs the same `train --ray local` twice, each
in its own process so its peak resident memory (the driver process only; Ray's workers are
other processes) is its own: `--fit memory` (the table gathered in the driver for
scikit-learn) and `--fit-budget 1M` (over the budget: the fit runs over the table's blocks
on the cluster, the driver gathers only a sample of clues). Prints each run's table size,
wall and driver CPU seconds and peak RSS, and the ratios of the second to the first.
"""

from __future__ import annotations

import argparse
import json
import resource
import sys
import tempfile
import time
from pathlib import Path

from retriever import build_index
from tests.benchmarks.harness import bench_parser, child_json, demo_corpus

MODES = {"gathered": ["--fit", "memory"], "out-of-core": ["--fit-budget", "1M"]}


def child(work: Path, mode: str) -> None:
    """Child: one training; prints its seconds, CPU seconds, peak RSS and fit as JSON."""
    from api.cli import main

    t = time.perf_counter()
    out = work / f"{mode}.json"
    argv = ["train", "--index", str(work / "index"), "--log",
            str(work / "data" / "questions_train.jsonl"), "--out", str(out), "--ray", "local",
            "--candidates", "bm25", "--json", *MODES[mode]]  # fmt: skip
    if main(argv) != 0:
        raise SystemExit(f"train failed: {argv}")
    seconds = time.perf_counter() - t
    use = resource.getrusage(resource.RUSAGE_SELF)
    model = json.loads(out.read_text(encoding="utf-8"))
    fit = model["fit"]
    print(
        json.dumps(
            {
                "seconds": seconds,
                "cpu_seconds": use.ru_utime + use.ru_stime,
                "peak_rss_mib": use.ru_maxrss / 1024,  # Linux: KiB
                "rows": model["training"]["rows"],
                "table_mib": fit["table_bytes"] / 2**20,
                "method": fit["method"],
                "driver_rows": fit["driver_rows"],
                "C": model["C"],
                "calibration": model["calibration"]["method"],
            }
        )
    )


def main() -> int:
    ap = bench_parser(__doc__, articles=3000)
    ap.add_argument("--questions", type=int, default=6000, help="clues generated (default 6000)")
    ap.add_argument("--work", type=Path, default=None, help="folder to keep (default: temporary)")
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args.work, args.child)
        return 0
    with tempfile.TemporaryDirectory() as tmp:
        work = args.work or Path(tmp)
        data = demo_corpus(work, args.articles, args.questions)
        if not (work / "index").exists():
            build_index(data / "articles.jsonl", work / "index", vectors=False)
        runs = {}
        for mode in MODES:
            runs[mode] = child_json(
                "tests.benchmarks.bench_outofcore", ["--work", str(work), "--child", mode]
            )
            print(mode, json.dumps(runs[mode]), file=sys.stderr)
        g, o = runs["gathered"], runs["out-of-core"]
        print(f"table: {g['rows']:,} rows, {g['table_mib']:,.0f} MiB of features")
        print("| run | fit | rows the driver held | wall s | driver CPU s | driver peak RSS MiB |")
        print("| --- | --- | --- | --- | --- | --- |")
        for name, r in runs.items():
            print(
                f"| {name} | {r['method']} | {r['driver_rows']:,} | {r['seconds']:.0f} | "
                f"{r['cpu_seconds']:.0f} | {r['peak_rss_mib']:,.0f} |"
            )
        print(
            f"out-of-core / gathered: peak RSS x{o['peak_rss_mib'] / g['peak_rss_mib']:.2f}, "
            f"wall x{o['seconds'] / g['seconds']:.2f}; C {o['C']} vs {g['C']}, "
            f"calibration {o['calibration']} vs {g['calibration']}"
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
