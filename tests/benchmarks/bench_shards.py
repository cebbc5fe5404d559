"""Benchmark: a sharded build on a local Ray cluster against the single-machine index.

Not a test (no assertions on time). Run:
    python -m tests.benchmarks.bench_shards --articles 100000 --shards 4
It generates an invented corpus of that size with corpus_demo, then, each in its own
process so peak memory is its own: builds the single index, builds the sharded one with
`--ray local` (a Ray cluster started in that process, one task per shard) and in-process,
then times BM25 queries per clue on both (the sharded index asks every shard and merges),
and opens each shard alone to search the same clues: the memory one shard's searcher adds
(resident memory after the searches minus before opening), beside the whole index's.
BM25 only by default; `--vectors` adds word vectors to every build (training takes
minutes at 100k). Ratios are against the single index in this run.
"""

from __future__ import annotations

import argparse
import gc
import json
import resource
import statistics
import tempfile
import time
from pathlib import Path

from retriever import build_index, load_index
from retriever.shards import build_sharded
from tests.benchmarks.harness import bench_parser, child_json, demo_corpus


def _peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: KiB


def _pct(values: list[float], q: float) -> float:
    values = sorted(values)
    return values[min(len(values) - 1, int(q * len(values)))]


def _rss_mib() -> float:
    """This process's resident memory now (Linux)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def _mib(folder: Path) -> float:
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file()) / 2**20


def _clues(work: Path, n: int) -> list[str]:
    with open(work / "data" / "questions_test.jsonl", encoding="utf-8") as fh:
        return [json.loads(line)["clue"] for line in fh][:n]


def build(work: Path, kind: str, shards: int, vectors: bool) -> None:
    """Child: one build; prints its seconds and peak RSS (this process) as JSON."""
    corpus = work / "data" / "articles.jsonl"
    vec: object = {"threads": 2} if vectors else False
    t = time.perf_counter()
    if kind == "single":
        build_index(corpus, work / "single", vectors=vec)
    else:
        ray = "local" if kind == "ray" else None
        build_sharded(corpus, work / kind, shards=shards, ray_address=ray, vectors=vec)
    seconds = time.perf_counter() - t
    print(json.dumps({"seconds": seconds, "peak_rss_mib": _peak_rss_mib()}))


def query(work: Path, folder: str, queries: int, k: int) -> None:
    """Child: open one index (single, sharded or one shard) and time a search per clue."""
    path = work / folder
    gc.collect()
    before = _rss_mib()
    index = load_index(path, sharded=True) if folder == "ray" else None
    if index is None:
        from retriever.index import Index

        index = Index(path)  # one shard opened alone, or the single index
    gc.collect()
    gc.freeze()
    clues = _clues(work, queries)
    for c in clues:  # warm the page cache and the buffers
        index.search(c, k)
    ms = []
    for c in clues:
        t0 = time.perf_counter()
        index.search(c, k)
        ms.append((time.perf_counter() - t0) * 1e3)
    print(
        json.dumps(
            {
                "p50": _pct(ms, 0.5),
                "p95": _pct(ms, 0.95),
                "mean": statistics.fmean(ms),
                "added_rss_mib": _rss_mib() - before,
                "articles": index.n_docs,
            }
        )
    )


def _child(args: list[str]) -> dict[str, float]:
    return child_json("tests.benchmarks.bench_shards", args)


def main() -> None:
    """Parse options, build in a temporary folder, print markdown tables."""
    ap = bench_parser(__doc__)
    ap.add_argument("--shards", type=int, default=4, help="shards (default 4)")
    ap.add_argument("--vectors", action="store_true", help="train word vectors in every build")
    ap.add_argument("--work", type=Path, default=None, help="folder to keep (default: temporary)")
    ap.add_argument(
        "--reuse", action="store_true", help="time the queries on the builds kept in --work"
    )
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--folder", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child == "query":
        query(args.work, args.folder, args.queries, args.k)
        return
    if args.child is not None:
        build(args.work, args.child, args.shards, args.vectors)
        return
    with tempfile.TemporaryDirectory() as tmp:
        work = args.work or Path(tmp)
        demo_corpus(work, args.articles, max(2 * args.queries, 200))
        common = ["--work", str(work), "--shards", str(args.shards)]
        if args.vectors:
            common.append("--vectors")
        kinds = ("single", "ray", "here")
        builds = {} if args.reuse else {k: _child(["--child", k, *common]) for k in kinds}
        base = builds["single"]["seconds"] if builds else 1.0
        what = "BM25 + word vectors" if args.vectors else "BM25 only"
        print(f"\n{args.articles:,} articles, {args.shards} shards, {what}, each in its process\n")
        print("| build | seconds | x single | peak RSS MiB (driver) | on disk MiB |")
        print("|---|---|---|---|---|")
        names = {"single": "single index", "ray": "sharded, --ray local", "here": "sharded, no Ray"}
        for kind, b in builds.items():
            print(
                f"| {names[kind]} | {b['seconds']:.1f} | {b['seconds'] / base:.2f} | "
                f"{b['peak_rss_mib']:,.0f} | {_mib(work / kind):,.0f} |"
            )
        opts = ["--work", str(work), "--queries", str(args.queries), "--k", str(args.k)]
        single = _child(["--child", "query", "--folder", "single", *opts])
        merged = _child(["--child", "query", "--folder", "ray", *opts])
        shard_dirs = sorted(p.name for p in (work / "ray").glob("shard-*"))
        alone = [_child(["--child", "query", "--folder", f"ray/{s}", *opts]) for s in shard_dirs]
        print(f"\nBM25 query, top {args.k}, {args.queries} clues\n")
        print("| index | articles | p50 ms | p95 ms | mean ms | x single | RSS added MiB |")
        print("|---|---|---|---|---|---|---|")
        rows = [("single index", single), ("sharded (all shards, merged)", merged)]
        rows += [(f"one shard alone ({s})", a) for s, a in zip(shard_dirs, alone, strict=True)]
        for name, r in rows:
            print(
                f"| {name} | {int(r['articles']):,} | {r['p50']:.2f} | {r['p95']:.2f} | "
                f"{r['mean']:.2f} | {r['mean'] / single['mean']:.2f} | {r['added_rss_mib']:,.0f} |"
            )


if __name__ == "__main__":
    main()
