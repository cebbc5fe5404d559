"""Benchmark: what the word vectors add to an index (build time, memory, disk) and how fast
dense search is beside the BM25 query, exact and approximate, with the approximate
search's recall against the exact one.

Not a test (no assertions on time). Run:
    python -m tests.benchmarks.bench_dense --articles 100000
It generates an invented corpus of that size with corpus_demo, then, each in its own
process so peak memory is its own: builds the index without vectors, builds it again with
the default vectors plus an HNSW graph (built whatever the corpus size, so both dense
modes can be timed on one index), and times per clue, on held-out clues: the BM25 query
(top k), the clue's vector, exact dense search (blocked product over the memory-mapped
vectors) and approximate dense search (the graph's candidates rescored exactly). Ratios
are against the BM25 query measured in the same process.

At 1M articles training the vectors on every article takes hours on 2 cores, so
`--train-sample N` trains them on a seeded sample of N articles (an index of the sample)
and then gives all articles their vectors from the sample's words and weights, as
`hunchwise index add` does for new articles; the build figures then include the sample's
build. `--ef-search 64,128,256` measures the graph at several efSearch values:
    python -m tests.benchmarks.bench_dense --articles 1000000 --train-sample 100000 --k 10
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

import numpy as np

from retriever import build_index, load_index
from tests.benchmarks.harness import bench_parser, child_output, demo_corpus


def _peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: KiB


def _pct(values: list[float], q: float) -> float:
    values = sorted(values)
    return values[min(len(values) - 1, int(q * len(values)))]


def _folder_mib(folder: Path, names: tuple[str, ...]) -> float:
    total = sum(p.stat().st_size for p in folder.iterdir() if p.name.startswith(names))
    return total / 2**20


def _sample_corpus(work: Path, n: int) -> Path:
    """A seeded sample of n of the corpus's lines, written beside it."""
    src = work / "data" / "articles.jsonl"
    with open(src, encoding="utf-8") as fh:
        total = sum(1 for _ in fh)
    keep = set(np.random.default_rng(7).choice(total, size=min(n, total), replace=False).tolist())
    out = work / "data" / f"sample-{n}.jsonl"
    with open(src, encoding="utf-8") as fh, open(out, "w", encoding="utf-8") as dst:
        dst.writelines(line for i, line in enumerate(fh) if i in keep)
    return out


def build(work: Path, with_vectors: bool, train_sample: int, ann_m: int) -> None:
    """Child: build one index, print its build seconds and peak RSS as JSON."""
    from retriever import vectors as vecs

    out = work / ("index-vec" if with_vectors else "index-bm25")
    corpus = work / "data" / "articles.jsonl"
    settings = {"ann_min_articles": 1, "ann_m": ann_m}
    t = time.perf_counter()
    if with_vectors and train_sample:
        # Vectors trained on a sample, then every article embedded with them (no graph for
        # the sample: it is only the training set).
        sample = work / "sample-index"
        build_index(_sample_corpus(work, train_sample), sample, vectors={"ann_min_articles": 10**9})
        trained = time.perf_counter() - t
        index = build_index(corpus, out, vectors=False)
        vecs.add_to_folder(out, index.analyzer, vecs.VectorSettings(**settings), from_folder=sample)
        extra = {"sample_build_seconds": trained}
    else:
        build_index(corpus, out, vectors=settings if with_vectors else False)
        extra = {}
    seconds = time.perf_counter() - t
    print(json.dumps({"seconds": seconds, "peak_rss_mib": _peak_rss_mib(), **extra}))


def measure(work: Path, queries: int, k: int, ef_values: list[int]) -> None:
    """Child: time the BM25 query and both dense searches per clue, and the graph's recall."""
    index = load_index(work / "index-vec")
    dense = index.dense
    assert dense is not None and dense.approximate, "the index was built without its graph"
    gc.collect()
    gc.freeze()
    with open(work / "data" / "questions_test.jsonl", encoding="utf-8") as fh:
        clues = [json.loads(line)["clue"] for line in fh][:queries]
    tokens = [index.analyzer.tokens(c) for c in clues]
    qvecs = [dense.vectors.query_vector(*index.term_ids(t)) for t in tokens]
    # One pass to warm caches and the graph, then the timed pass.
    for t, q in zip(tokens, qvecs, strict=True):
        index.search_tokens(t, k)
        dense.search([q], k, exact=True)
        dense.search([q], k)
    bm25_ms, qvec_ms, exact_ms, ann_ms, recalls = [], [], [], [], []
    for t, q in zip(tokens, qvecs, strict=True):
        t0 = time.perf_counter()
        index.search_tokens(t, k)
        t1 = time.perf_counter()
        dense.vectors.query_vector(*index.term_ids(t))
        t2 = time.perf_counter()
        [(exact_rows, _)] = dense.search([q], k, exact=True)
        t3 = time.perf_counter()
        [(ann_rows, _)] = dense.search([q], k)
        t4 = time.perf_counter()
        bm25_ms.append((t1 - t0) * 1e3)
        qvec_ms.append((t2 - t1) * 1e3)
        exact_ms.append((t3 - t2) * 1e3)
        ann_ms.append((t4 - t3) * 1e3)
        if exact_rows.size:
            recalls.append(np.isin(exact_rows, ann_rows).mean())
    rows = {
        "BM25 query (top k)": bm25_ms,
        "clue vector": qvec_ms,
        "dense exact": exact_ms,
        "dense approximate (HNSW + exact rescoring)": ann_ms,
    }
    base = statistics.fmean(bm25_ms)
    print(f"\n{index.n_docs:,} articles, {len(clues)} clues, k={k}\n")
    print("| step | p50 ms | p95 ms | mean ms | mean / BM25 query |")
    print("|---|---|---|---|---|")
    for name, ms in rows.items():
        mean = statistics.fmean(ms)
        print(
            f"| {name} | {_pct(ms, 0.5):.3f} | {_pct(ms, 0.95):.3f} | {mean:.3f} "
            f"| {mean / base:.2f} |"
        )
    print(
        f"\napproximate recall@{k} against exact: {statistics.fmean(recalls):.4f} "
        f"(min {min(recalls):.2f}, {len(recalls)} clues with a vector)"
    )
    ann = dense._ann_index()
    exact = dense.search(qvecs, k, exact=True)
    print(f"\n| efSearch | recall@{k} vs exact | dense p50 ms | dense mean / BM25 query |")
    print("|---|---|---|---|")
    for ef in ef_values:
        ann.ef_search = ef
        ms, rec = [], []
        for q, (ex_rows, _) in zip(qvecs, exact, strict=True):
            dense.search([q], k)  # warm
            t0 = time.perf_counter()
            [(rows, _)] = dense.search([q], k)
            ms.append((time.perf_counter() - t0) * 1e3)
            if ex_rows.size:
                rec.append(np.isin(ex_rows, rows).mean())
        print(
            f"| {ef} | {statistics.fmean(rec):.4f} | {_pct(ms, 0.5):.3f} "
            f"| {statistics.fmean(ms) / base:.2f} |"
        )


def _child(args: list[str]) -> str:
    return child_output("tests.benchmarks.bench_dense", args)


def main() -> None:
    """Parse options, build both indexes in a temporary folder, print markdown tables."""
    ap = bench_parser(__doc__)
    ap.add_argument(
        "--work", type=Path, default=None, help="folder to keep the data in (default: temporary)"
    )
    ap.add_argument(
        "--train-sample", type=int, default=0, help="train the vectors on this many articles"
    )
    ap.add_argument("--ann-m", type=int, default=16, help="HNSW graph degree (default 16)")
    ap.add_argument(
        "--ef-search", default="64,128,256", help="efSearch values to measure (default 64,128,256)"
    )
    ap.add_argument("--child", choices=["bm25", "vectors", "measure"], help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child == "measure":
        efs = [int(v) for v in args.ef_search.split(",")]
        measure(args.work, args.queries, args.k, efs)
        return
    if args.child is not None:
        build(args.work, args.child == "vectors", args.train_sample, args.ann_m)
        return
    with tempfile.TemporaryDirectory() as tmp:
        work = args.work or Path(tmp)
        demo_corpus(work, args.articles, max(2 * args.queries, 200))
        common = ["--work", str(work), "--train-sample", str(args.train_sample)]
        common += ["--ann-m", str(args.ann_m)]
        plain = json.loads(_child(["--child", "bm25", *common]).splitlines()[-1])
        vec = json.loads(_child(["--child", "vectors", *common]).splitlines()[-1])
        disk = _folder_mib(work / "index-vec", ("docvec", "wordvec", "termvec"))
        print(f"\nbuild of {args.articles:,} articles, each in its own process\n")
        print("| index | build s | build peak RSS MiB | vector files MiB |")
        print("|---|---|---|---|")
        print(f"| BM25 only | {plain['seconds']:.1f} | {plain['peak_rss_mib']:,.0f} | - |")
        print(
            f"| BM25 + vectors + HNSW graph | {vec['seconds']:.1f} | "
            f"{vec['peak_rss_mib']:,.0f} | {disk:,.0f} |"
        )
        print(
            f"\nadded by the vectors: build x{vec['seconds'] / plain['seconds']:.2f}, "
            f"peak RSS x{vec['peak_rss_mib'] / plain['peak_rss_mib']:.2f}"
        )
        if "sample_build_seconds" in vec:
            print(
                f"(vectors trained on a {args.train_sample:,}-article sample, its build "
                f"{vec['sample_build_seconds']:.1f} s of the total)"
            )
        opts = ["--queries", str(args.queries), "--k", str(args.k), "--ef-search", args.ef_search]
        print(_child(["--child", "measure", "--work", str(work), *opts]))


if __name__ == "__main__":
    main()
