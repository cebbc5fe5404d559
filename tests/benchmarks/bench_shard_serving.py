"""Latency of sharded serving on Ray Serve against plain `hunchwise serve`, same run.

Not a test: it prints a table. One client on loopback sends the demo's test clues one after
the other (POST /v1/rank, k = 20; a warm-up first), and the table gives the median, 90th
percentile and mean latency of
  * `hunchwise serve` over the unsharded index (one uvicorn worker);
  * `hunchwise serve --ray local --shard-replicas 1` over the same corpus in S shards;
and, to see where the difference goes, the library call `rank_clues` on one clue at a time
over the unsharded `Index` and over a `ShardedView` searching its shards in this process
(the view's cost without Ray: merging, and reading rows through the shards).
`--candidates hybrid` trains the default model instead (BM25 + word vectors, refined on the
training clues) and copies its vectors into the shards (`index copy-vectors`), so each
request also sends the clue's vector to every shard for its nearest articles.

    python -m tests.benchmarks.bench_shard_serving [--articles 3000] [--shards 3]
        [--candidates bm25|hybrid]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np

from tests.api.svc_helpers import serve

ROOT = Path(__file__).resolve().parents[2]


def run(cmd: list[str]) -> None:
    """Run a command from the repo root, failing loudly."""
    print("$", " ".join(cmd), flush=True)
    subprocess.run(cmd, cwd=ROOT, check=True)


def prepare(
    work: Path, articles: int, shards: int, candidates: str
) -> tuple[Path, Path, Path, list[str]]:
    """Corpus, unsharded and sharded indexes, a model over `candidates` (reused when there)."""
    data, index, sharded = work / "data", work / f"index-{candidates}", work / "sharded"
    model = work / f"model-{candidates}.json"
    cli = [sys.executable, "-m", "api.cli"]
    if not (data / "articles.jsonl").exists():
        gen = [sys.executable, "-m", "corpus_demo.generate", "--articles", str(articles)]
        run([*gen, "--questions", "2000", "--out", str(data), "--no-progress"])
    corpus = str(data / "articles.jsonl")
    # A BM25 model needs no word vectors: training them (minutes at 1M articles) is skipped.
    no_vectors = ["--no-vectors"] if candidates == "bm25" else []
    if not (index / "manifest.json").exists():
        run([*cli, "index", "build", corpus, "--out", str(index), *no_vectors])
    if not (sharded / "manifest.json").exists():
        shard_opts = ["--shards", str(shards), *no_vectors]
        run([*cli, "index", "build", corpus, "--out", str(sharded), *shard_opts])
    if not model.exists():
        train = [
            *cli,
            "train",
            "--index",
            str(index),
            "--candidates",
            candidates.replace("hybrid", "auto"),
        ]
        run([*train, "--log", str(data / "questions_train.jsonl"), "--out", str(model)])
    vectors = json.loads(model.read_text(encoding="utf-8")).get("candidates", {}).get("vectors")
    if vectors:
        copy = [*cli, "index", "copy-vectors", str(index), str(sharded), "--generation", vectors]
        run(copy)
    lines = (data / "questions_test.jsonl").read_text(encoding="utf-8").splitlines()
    return index, sharded, model, [json.loads(x)["clue"] for x in lines if x.strip()]


def summary(seconds: list[float]) -> dict[str, float]:
    """Median, 90th percentile and mean, in milliseconds."""
    ms = np.asarray(seconds) * 1000
    return {"p50": float(np.median(ms)), "p90": float(np.percentile(ms, 90)), "mean": ms.mean()}


def http_latency(url: str, clues: list[str], warmup: int) -> dict[str, float]:
    """One client, one request at a time."""
    times = []
    with httpx.Client(base_url=url, timeout=60) as c:
        for i, clue in enumerate(clues[:warmup] + clues):
            t = time.perf_counter()
            r = c.post("/v1/rank", json={"clue": clue, "k": 20})
            if i >= warmup:
                times.append(time.perf_counter() - t)
            r.raise_for_status()
    return summary(times)


def library_latency(index: Any, model_path: Path, clues: list[str]) -> dict[str, float]:
    """`rank_clues` on one clue at a time, in this process."""
    from reranker import load_model, rank_clues

    model = load_model(model_path, index=index)
    for clue in clues[:20]:
        rank_clues(index, model, [clue], k=20)
    times = []
    for clue in clues:
        t = time.perf_counter()
        rank_clues(index, model, [clue], k=20)
        times.append(time.perf_counter() - t)
    return summary(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--articles", type=int, default=3000)
    ap.add_argument("--shards", type=int, default=3)
    ap.add_argument("--clues", type=int, default=300, help="requests measured per server")
    ap.add_argument("--candidates", choices=("bm25", "hybrid"), default="bm25")
    ap.add_argument("--work", type=Path, default=ROOT / "runs" / "bench-shard-serving")
    args = ap.parse_args()
    work = args.work / f"{args.articles}"
    work.mkdir(parents=True, exist_ok=True)
    index, sharded, model, clues = prepare(work, args.articles, args.shards, args.candidates)
    clues = (clues * (1 + args.clues // max(len(clues), 1)))[: args.clues]

    from retriever import load_index
    from retriever.shardview import ShardedView

    rows: dict[str, dict[str, float]] = {}
    rows["library, one index"] = library_latency(load_index(index), model, clues)
    rows["library, ShardedView (no Ray)"] = library_latency(ShardedView(sharded), model, clues)
    m = ["--model", str(model)]
    with serve(["--index", str(index), *m], work) as plain:
        rows["HTTP, hunchwise serve"] = http_latency(plain.url, clues, 20)
    ray_args = ["--index", str(sharded), *m, "--ray", "local"]
    with serve(ray_args, work, ready_timeout=600) as on_ray:
        rows[f"HTTP, serve --ray local ({args.shards} shards)"] = http_latency(
            on_ray.url, clues, 20
        )
    base = rows["HTTP, hunchwise serve"]["p50"]
    print(f"\n{args.articles} articles, {args.candidates} model, {len(clues)} clues, k = 20\n")
    print(f"| {'path':45} | p50 ms | p90 ms | mean ms | p50 / plain serve |")
    print(f"| {'-' * 45} | ---: | ---: | ---: | ---: |")
    for name, r in rows.items():
        print(
            f"| {name:45} | {r['p50']:.2f} | {r['p90']:.2f} | {r['mean']:.2f} "
            f"| {r['p50'] / base:.2f} |"
        )


if __name__ == "__main__":
    main()
