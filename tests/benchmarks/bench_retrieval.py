"""Benchmark: hunchwise retrieval against rank_bm25, bm25s (numpy, numba) and tantivy on one corpus.

Run:  python -m tests.benchmarks.bench_retrieval --sizes 10000,100000 [--out results.md]

Every system builds, saves, loads and queries in its own subprocess so that each peak RSS is
clean. The corpus is FOLDOC text (Debian's dict-foldoc) cut into runs and lightly perturbed
(see tests/retriever/foldoc.py); the queries are 20-40 word clue-like windows of articles.
Not a test: it prints numbers and ratios measured in the same run, and asserts nothing.

hunchwise's BM25 build runs without word vectors; their training is timed on its own
(`vectors_s`, skipped with --no-vectors). The build is compared with tantivy twice: with the
default analyzer (which stems) and with `hunchwise-nostem`, the analysis tantivy's analyzer
here does (lower case, the same English stop words, no stemming).
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import random
import resource
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from tests.benchmarks.harness import child_json
from tests.retriever.foldoc import clue_from, foldoc_words, synthetic_articles

SYSTEMS = ["hunchwise", "hunchwise-nostem", "tantivy", "bm25s-numpy", "bm25s-numba", "rank_bm25"]
N_QUERIES = 300


def _peak_rss_mib() -> float:
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss  # hunchwise's counting workers
    return (own + kids) / 1024


def _cpu_s() -> float:
    """CPU seconds (user + system) of this process, its threads and its waited-for children
    (hunchwise's counting workers): on a shared machine the steadier figure than wall time."""
    own = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


def _dir_bytes(path: Path) -> int:
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())


def _latencies(search: Any, clues: list[str]) -> tuple[float, float]:
    times = []
    for clue in clues:
        t = time.perf_counter()
        search(clue)
        times.append(time.perf_counter() - t)
    times.sort()
    return statistics.median(times) * 1e3, times[int(0.95 * (len(times) - 1))] * 1e3


BATCH_ROUNDS = 5  # a batch of 300 clues takes tens of milliseconds: one timing is noise


def _batch_qps(batch: Any, clues: list[str], threads: int) -> float:
    """Queries per second of `batch(clues, threads)`: the median of BATCH_ROUNDS timed runs,
    after one untimed run on the same thread count (pools started, per-thread buffers made,
    bm25s-numba's threaded path compiled). Every system is timed by this one function."""
    batch(clues[: max(64, 16 * threads)], threads)
    times = []
    for _ in range(BATCH_ROUNDS):
        t = time.perf_counter()
        batch(clues, threads)
        times.append(time.perf_counter() - t)
    return len(clues) / statistics.median(times)


def _quiet_gc() -> None:
    """Move what a system loaded out of the garbage collector's way, as a long-running
    server does (gc.freeze), so a full collection of the loaded objects does not land
    inside one system's timed batch and not another's. Done for every system alike."""
    gc.collect()
    gc.freeze()


def _texts(corpus: Path) -> list[str]:
    with open(corpus, encoding="utf-8") as fh:
        return [json.loads(line)["text"] for line in fh]


def _bm25s_tokens(texts: list[str], stemmer: Any) -> Any:
    import bm25s
    from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS

    return bm25s.tokenize(
        texts, stopwords=sorted(ENGLISH_STOP_WORDS), stemmer=stemmer, show_progress=False
    )


def _import(system: str) -> float:
    """Import the system's modules up front, so build and load times exclude imports."""
    t = time.perf_counter()
    if system.startswith("hunchwise"):
        import retriever
    elif system == "tantivy":
        import tantivy  # noqa: F401

        import retriever
    elif system.startswith("bm25s"):
        import bm25s  # noqa: F401
        import Stemmer  # noqa: F401
        from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS  # noqa: F401
    else:
        import rank_bm25  # noqa: F401

        import retriever  # noqa: F401
    return time.perf_counter() - t


def work_build(system: str, corpus: Path, folder: Path) -> dict[str, Any]:
    """Build (reading the corpus file) and save; returns seconds and size."""
    _import(system)
    if system == "tantivy" or system.startswith("hunchwise"):
        return work_build_peer(system, corpus, folder)
    t = time.perf_counter()
    if system.startswith("bm25s"):
        import bm25s
        import Stemmer

        texts = _texts(corpus)
        retriever = bm25s.BM25(method="robertson", backend=system.split("-")[1])
        retriever.index(_bm25s_tokens(texts, Stemmer.Stemmer("english")), show_progress=False)
        retriever.save(str(folder))
    else:
        from rank_bm25 import BM25Okapi

        from retriever import Analyzer

        an = Analyzer()
        BM25Okapi([an.tokens(t) for t in _texts(corpus)])
    seconds = time.perf_counter() - t
    size = _dir_bytes(folder) if folder.exists() else 0
    return {"build_s": seconds, "size_mib": size / 2**20, "build_rss_mib": _peak_rss_mib()}


def work_query(system: str, corpus: Path, folder: Path, clues: list[str]) -> dict[str, Any]:
    """Load from disk, first query, single-query latencies, batch throughput."""
    out: dict[str, Any] = {"import_s": _import(system)}
    if system == "tantivy":
        return {**out, **work_query_tantivy(folder, clues)}
    t = time.perf_counter()
    if system.startswith("hunchwise"):
        from retriever import load_index

        idx = load_index(folder)
        out["load_s"] = time.perf_counter() - t
        t = time.perf_counter()
        idx.search(clues[0], 10)
        out["first_query_s"] = time.perf_counter() - t

        def one(c: str) -> Any:
            return idx.search(c, 10)

        def batch(cs: list[str], threads: int = 1) -> Any:
            return idx.search_many(cs, 10, threads=threads)

    elif system.startswith("bm25s"):
        import bm25s
        import Stemmer

        stemmer = Stemmer.Stemmer("english")
        backend = system.split("-")[1]
        retriever = bm25s.BM25.load(str(folder), mmap=True)
        out["load_s"] = time.perf_counter() - t
        t = time.perf_counter()
        retriever.backend = backend
        if backend == "numba":
            retriever.activate_numba_scorer()
        out["warmup_s"] = time.perf_counter() - t

        def run(cs: list[str], threads: int = 1) -> Any:
            toks = _bm25s_tokens(cs, stemmer)
            return retriever.retrieve(toks, k=10, show_progress=False, n_threads=threads)

        t = time.perf_counter()
        run(clues[:1])
        out["first_query_s"] = time.perf_counter() - t

        def one(c: str) -> Any:
            return run([c])

        batch = run
    else:
        from rank_bm25 import BM25Okapi

        from retriever import Analyzer

        an = Analyzer()
        bm = BM25Okapi([an.tokens(t) for t in _texts(corpus)])
        out["load_s"] = time.perf_counter() - t
        import numpy as np

        def one(c: str) -> Any:
            scores = bm.get_scores(an.tokens(c))
            return np.argsort(-scores)[:10]

        def batch(cs: list[str], threads: int = 1) -> Any:
            return [one(c) for c in cs]

        t = time.perf_counter()
        one(clues[0])
        out["first_query_s"] = time.perf_counter() - t
    _quiet_gc()
    out["p50_ms"], out["p95_ms"] = _latencies(one, clues)
    if system == "rank_bm25":  # far too slow to repeat
        t = time.perf_counter()
        batch(clues)
        out["batch_qps"] = len(clues) / (time.perf_counter() - t)
    else:
        out["batch_qps"] = _batch_qps(batch, clues, 1)
        out["batch2_qps"] = _batch_qps(batch, clues, 2)
    out["query_rss_mib"] = _peak_rss_mib()
    out["queries"] = len(clues)
    return out


# --- build-time peers: hunchwise's BM25 build (both analyzer settings) and tantivy ---------

BUILD_FLAGS: list[str] = []  # "novectors": do not time word-vector training
NOSTEM: dict[str, Any] = {"stemmer": None}  # the analysis tantivy's analyzer below does


def _hunchwise_options(system: str) -> dict[str, Any]:
    return NOSTEM if system == "hunchwise-nostem" else {}


def _tantivy_analyzer() -> Any:
    """Lower case, scikit-learn's English stop words (hunchwise's list), no stemming."""
    import tantivy

    from retriever.analyzer import ENGLISH_STOP_WORDS

    return (
        tantivy.TextAnalyzerBuilder(tantivy.Tokenizer.simple())
        .filter(tantivy.Filter.lowercase())
        .filter(tantivy.Filter.custom_stopword(sorted(ENGLISH_STOP_WORDS)))
        .build()
    )


def _tantivy_index(folder: Path) -> Any:
    import tantivy

    schema = (
        tantivy.SchemaBuilder()
        .add_unsigned_field("row", stored=True)
        .add_text_field("title", tokenizer_name="hw", index_option="freq")
        .add_text_field("body", tokenizer_name="hw", index_option="freq")
        .build()
    )
    folder.mkdir(parents=True, exist_ok=True)
    index = tantivy.Index(schema, path=str(folder))
    index.register_tokenizer("hw", _tantivy_analyzer())
    return index


def work_build_peer(system: str, corpus: Path, folder: Path) -> dict[str, Any]:
    """hunchwise's BM25 build (word vectors timed apart) or tantivy's, from the corpus file.

    build_s includes reading and parsing the file for both; tantivy's parse_s says how much
    of it Python's json took (its index_s is the rest: tokenizing, indexing, committing).
    """
    out: dict[str, Any] = {}
    if system == "tantivy":
        # A second round on the same size must not add to the first round's index.
        shutil.rmtree(folder, ignore_errors=True)
    t = time.perf_counter()
    cpu = _cpu_s()
    if system == "tantivy":
        import tantivy

        with open(corpus, encoding="utf-8") as fh:
            recs = [json.loads(line) for line in fh]
        out["parse_s"] = time.perf_counter() - t
        index = _tantivy_index(folder)
        writer = index.writer(heap_size=256_000_000)
        for row, rec in enumerate(recs):
            writer.add_document(tantivy.Document(row=row, title=rec["title"], body=rec["text"]))
        writer.commit()
        writer.wait_merging_threads()
        out["build_s"] = time.perf_counter() - t
        out["build_cpu_s"] = _cpu_s() - cpu
        out["index_s"] = out["build_s"] - out["parse_s"]
    else:
        from retriever import Analyzer, build_index
        from retriever import vectors as vecs

        options = _hunchwise_options(system)
        build_index(corpus, folder, vectors=False, **options)
        out["build_s"] = time.perf_counter() - t
        out["build_cpu_s"] = _cpu_s() - cpu
        if system == "hunchwise" and "novectors" not in BUILD_FLAGS:
            size = _dir_bytes(folder)
            t = time.perf_counter()
            vecs.add_to_folder(folder, Analyzer(**options), vecs.VectorSettings())
            out["vectors_s"] = time.perf_counter() - t
            out["vectors_mib"] = (_dir_bytes(folder) - size) / 2**20
    out["size_mib"] = _dir_bytes(folder) / 2**20
    out["build_rss_mib"] = _peak_rss_mib()
    return out


def work_query_tantivy(folder: Path, clues: list[str]) -> dict[str, Any]:
    """tantivy's load, latencies, 1- and 2-thread batches (the Python bindings have no batch
    search; a thread pool calls its searcher, which is thread-safe), and the top-10 overlap
    with hunchwise-nostem's index of the same corpus. Queries are hunchwise-nostem's tokens,
    each an OR of term queries on both fields."""
    from concurrent.futures import ThreadPoolExecutor

    import tantivy

    from retriever import Analyzer, load_index

    an = Analyzer(**NOSTEM)
    out: dict[str, Any] = {}
    t = time.perf_counter()
    index = tantivy.Index.open(str(folder))
    index.register_tokenizer("hw", _tantivy_analyzer())
    searcher = index.searcher()
    schema = index.schema
    out["load_s"] = time.perf_counter() - t

    def query(clue: str) -> Any:
        terms = [
            (tantivy.Occur.Should, tantivy.Query.term_query(schema, f, tok, index_option="freq"))
            for tok in dict.fromkeys(an.tokens(clue))
            for f in ("body", "title")
        ]
        return tantivy.Query.boolean_query(terms)

    def one(clue: str) -> Any:
        return searcher.search(query(clue), 10, count=False).hits

    t = time.perf_counter()
    one(clues[0])
    out["first_query_s"] = time.perf_counter() - t
    _quiet_gc()
    out["p50_ms"], out["p95_ms"] = _latencies(one, clues)
    pools = {n: ThreadPoolExecutor(n) for n in (1, 2)}

    def batch(cs: list[str], threads: int) -> Any:
        return list(pools[threads].map(one, cs))

    out["batch_qps"] = _batch_qps(batch, clues, 1)
    out["batch2_qps"] = _batch_qps(batch, clues, 2)
    for pool in pools.values():
        pool.shutdown()
    out["query_rss_mib"] = _peak_rss_mib()
    out["queries"] = len(clues)
    peer = folder.with_name(folder.name.replace("tantivy", "hunchwise-nostem"))
    if peer.exists():
        hw = load_index(peer)
        shared = []
        for clue in clues:
            mine = {searcher.doc(a)["row"][0] for _, a in one(clue)}
            theirs = {h.row for h in hw.search(clue, 10)}
            shared.append(len(mine & theirs) / max(1, len(theirs)))
        out["top10_overlap"] = statistics.mean(shared)
    return out


def build_table(all_results: dict[int, dict[str, dict[str, Any]]]) -> str:
    """hunchwise's BM25 build against tantivy's on the same text, with both analyzer settings:
    wall seconds, CPU seconds (all processes) and each one's ratio to tantivy's."""
    lines = [
        "| articles | system | build_s | ratio | build CPU s | CPU ratio (<= 1 is as fast) "
        "| build RSS MiB | word vectors_s (apart) | top-10 overlap |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    for n, res in all_results.items():
        tv = res.get("tantivy", {})
        if "build_s" not in tv:
            continue
        for name in ("tantivy", "hunchwise-nostem", "hunchwise"):
            r = res.get(name, {})
            if "build_s" not in r:
                continue
            cpu = r.get("build_cpu_s")
            cpu_ratio = cpu / tv["build_cpu_s"] if cpu and tv.get("build_cpu_s") else None
            lines.append(
                f"| {n} | {name} | {r['build_s']:.2f} | {r['build_s'] / tv['build_s']:.2f} | "
                f"{_fmt(cpu)} | {_fmt(cpu_ratio)} | {_fmt(r.get('build_rss_mib'), 0)} | "
                f"{_fmt(r.get('vectors_s'))} | {_fmt(tv.get('top10_overlap'))} |"
            )
    return "\n".join(lines)


def work_prune_modes(folder: Path, clues: list[str], k: int = 10) -> dict[str, Any]:
    """hunchwise's windowed (retriever/_daat.h) and exhaustive paths on one loaded index, in
    the same process: single-clue p50/p95 (ms) and batch q/s at 1 and 2 threads for each,
    the share of postings the windowed path read, and a check that both give the same hits."""
    import numpy as np

    from retriever import load_index, scoring

    idx = load_index(folder)
    for c in clues[:20]:
        idx.search(c, k)  # warm the memory maps
    _quiet_gc()
    out: dict[str, Any] = {}
    hits: dict[str, Any] = {}
    for name, mode in (("exhaustive", False), ("windowed", True)):
        idx.prune = mode
        p50, p95 = _latencies(lambda c: idx.search(c, k), clues)
        row = {"p50_ms": p50, "p95_ms": p95}
        for threads in (1, 2):
            row[f"batch{threads}_qps"] = _batch_qps(
                lambda cs, th: idx.search_many(cs, k, threads=th), clues, threads
            )
        hits[name] = [[(h.row, h.score) for h in hs] for hs in idx.search_many(clues, k)]
        out[name] = row
    plan = idx._plan([idx.analyzer.tokens(c) for c in clues])
    work = {m: np.zeros(len(clues), dtype=np.int64) for m in (True, False)}
    for m, w in work.items():
        scoring.top_k_many(idx._buffer(), plan, k, prune=m, work=w)
    out["postings_read_share"] = float(work[True].sum() / max(1, int(work[False].sum())))
    out["same_hits"] = hits["windowed"] == hits["exhaustive"]
    return out


def prune_table(n: int, res: dict[str, Any]) -> str:
    """Markdown rows for work_prune_modes at one size."""
    lines = [
        f"windowed vs exhaustive at {n:,} articles (same run; same hits: {res['same_hits']}, "
        f"postings read: {res['postings_read_share']:.0%})",
        "",
        "| path | p50 ms | p95 ms | batch q/s, 1 thread | batch q/s, 2 threads |",
        "| --- | --- | --- | --- | --- |",
    ]
    for name in ("exhaustive", "windowed"):
        r = res[name]
        lines.append(
            f"| {name} | {r['p50_ms']:.3f} | {r['p95_ms']:.3f} | {r['batch1_qps']:,.0f} | "
            f"{r['batch2_qps']:,.0f} |"
        )
    return "\n".join(lines)


def _spawn(args: list[str]) -> dict[str, Any]:
    return child_json("tests.benchmarks.bench_retrieval", args)


def run_size(n: int, tmp: Path, words: list[str]) -> dict[str, dict[str, Any]]:
    """All systems on one corpus size."""
    corpus = tmp / f"corpus-{n}.jsonl"
    with open(corpus, "w", encoding="utf-8") as fh:
        for rec in synthetic_articles(n, seed=n, words=words):
            fh.write(json.dumps(rec) + "\n")
    rng = random.Random(n)
    texts = []
    with open(corpus, encoding="utf-8") as fh:
        for i, line in enumerate(fh):
            if i % max(1, n // 2000) == 0:
                texts.append(json.loads(line)["text"])
    clues = [clue_from(rng.choice(texts), rng, words) for _ in range(N_QUERIES)]
    queries = tmp / f"queries-{n}.json"
    queries.write_text(json.dumps(clues))
    results: dict[str, dict[str, Any]] = {}
    for system in SYSTEMS:
        folder = tmp / f"{system}-{n}"
        if system == "rank_bm25":
            few = 30 if n <= 100_000 else 5
            if n > 200_000:
                results[system] = {"skipped": "too slow and too large at this size"}
                continue
            (tmp / f"few-{n}.json").write_text(json.dumps(clues[:few]))
            res = _spawn(
                ["--work", "query", system, str(corpus), str(folder), str(tmp / f"few-{n}.json")]
            )
        else:
            res = _spawn(["--work", "build", system, str(corpus), str(folder), *BUILD_FLAGS])
            res.update(_spawn(["--work", "query", system, str(corpus), str(folder), str(queries)]))
        results[system] = res
        if system == "hunchwise":
            pr = _spawn(["--work", "prune", system, str(corpus), str(folder), str(queries)])
            res["prune_modes"] = pr
            print(prune_table(n, pr), flush=True)
        shown = {k: round(v, 4) if isinstance(v, float) else v for k, v in res.items()}
        print(
            f"  {n:>8} {system:<12} {json.dumps(shown)}",
            flush=True,
        )
    return results


def _fmt(v: Any, digits: int = 2) -> str:
    return "-" if v is None else f"{v:.{digits}f}"


def table(all_results: dict[int, dict[str, dict[str, Any]]]) -> str:
    """Markdown table of every measurement plus hunchwise / best-bm25s ratios."""
    cols = [
        "build_s",
        "size_mib",
        "build_rss_mib",
        "import_s",
        "load_s",
        "first_query_s",
        "p50_ms",
        "p95_ms",
        "batch_qps",
        "batch2_qps",
        "query_rss_mib",
    ]
    lines = ["| articles | system | " + " | ".join(cols) + " |", "|---|---|" + "---|" * len(cols)]
    for n, res in all_results.items():
        for system, r in res.items():
            if "skipped" in r:
                lines.append(f"| {n} | {system} | " + " | ".join("-" for _ in cols) + " |")
                continue
            lines.append(
                f"| {n} | {system} | "
                + " | ".join(
                    _fmt(r.get(c), 3 if c.endswith("_s") or c.endswith("_ms") else 1) for c in cols
                )
                + " |"
            )
    bm25s_rows = []
    for n, res in all_results.items():
        hw = res.get("hunchwise", {})
        peers = [res[s] for s in ("bm25s-numpy", "bm25s-numba") if "p50_ms" in res.get(s, {})]
        if not peers or "p50_ms" not in hw:  # a run with --systems leaving them out
            continue
        fastest = min(peers, key=lambda r: r["p50_ms"])
        name = next(s for s in ("bm25s-numpy", "bm25s-numba") if res.get(s) is fastest)
        best_batch = max(p["batch_qps"] for p in peers)
        best_batch2 = max(p["batch2_qps"] for p in peers)
        best_build = min(p["build_s"] for p in peers)
        min_rss = min(p["build_rss_mib"] for p in peers)
        bm25s_rows.append(
            f"| {n} | fastest single query: {name} | {hw['build_s'] / best_build:.2f} | "
            f"{hw['p50_ms'] / fastest['p50_ms']:.2f} | {hw['batch_qps'] / best_batch:.2f} | "
            f"{hw['batch2_qps'] / best_batch2:.2f} | "
            f"{hw['build_rss_mib'] / min_rss:.2f} |"
        )
    if bm25s_rows:
        lines += [
            "",
            "| articles | ratio (hunchwise / peer) | build_s vs bm25s (target <= 0.5) | "
            "p50 vs fastest bm25s (<= 1) | batch_qps vs fastest (>= 1) | "
            "2-thread batch vs fastest 2-thread (>= 1) | build RSS vs bm25s (<= 1) |",
            "|---|---|---|---|---|---|---|",
            *bm25s_rows,
        ]
    tantivy_rows = []
    for n, res in all_results.items():
        hw, tv = res.get("hunchwise", {}), res.get("tantivy", {})
        if "p50_ms" not in hw or "p50_ms" not in tv:
            continue
        two = hw["batch2_qps"] / hw["batch_qps"]
        tantivy_rows.append(
            f"| {n} | {hw['p50_ms'] / tv['p50_ms']:.2f} | {hw['p95_ms'] / tv['p95_ms']:.2f} | "
            f"{hw['batch_qps'] / tv['batch_qps']:.2f} | "
            f"{hw['batch2_qps'] / tv['batch2_qps']:.2f} | {two:.2f} |"
        )
    if tantivy_rows:
        lines += [
            "",
            "| articles | p50 vs tantivy (<= 0.7 at 100k, <= 0.5 at 1M) | p95 vs tantivy (< 1) | "
            "batch vs tantivy, 1 thread (>= 2) | 2 threads (>= 2) | "
            "hunchwise 2 threads / 1 thread (>= 1.7) |",
            "|---|---|---|---|---|---|",
            *tantivy_rows,
        ]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark (or, with --work, one measurement in this process)."""
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sizes", default="10000,100000")
    p.add_argument("--out", type=Path, help="also write the markdown table here")
    p.add_argument("--no-vectors", action="store_true", help="do not time word-vector training")
    p.add_argument(
        "--systems",
        default=",".join(SYSTEMS),
        help="comma-separated subset of " + ",".join(SYSTEMS),
    )
    p.add_argument("--work", nargs="+", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    SYSTEMS[:] = [s for s in SYSTEMS if s in args.systems.split(",")]
    if args.work:
        kind, system, corpus, folder, *rest = args.work
        if kind == "build":
            BUILD_FLAGS[:] = rest
            res = work_build(system, Path(corpus), Path(folder))
        elif kind == "prune":
            res = work_prune_modes(Path(folder), json.loads(Path(rest[0]).read_text()))
        else:
            res = work_query(
                system, Path(corpus), Path(folder), json.loads(Path(rest[0]).read_text())
            )
        print(json.dumps(res))
        return 0
    if args.no_vectors:
        BUILD_FLAGS.append("novectors")
    words = foldoc_words()
    results: dict[int, dict[str, dict[str, Any]]] = {}
    with tempfile.TemporaryDirectory(prefix="hw-bench-") as tmp:
        for n in (int(s) for s in args.sizes.split(",")):
            results[n] = run_size(n, Path(tmp), words)
    md = table(results) + "\n\n" + build_table(results)
    print(md)
    if args.out:
        args.out.write_text(md + "\n")
    return 0


if __name__ == "__main__":
    os.environ.setdefault("TQDM_DISABLE", "1")
    sys.exit(main())
