"""`index build`: its options, the build (one folder, or shards with --shards), and the
summary a build or an update prints."""

from __future__ import annotations

import argparse
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from retriever import Index, ReadReport

from .console import human_bytes, print_json, show_progress


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The options of `index build`."""
    p.add_argument(
        "corpus", type=Path, help="corpus file: one article per line/row with id, title, text"
    )
    p.add_argument(
        "--out", type=Path, required=True, help="index folder to write (replaced only on success)"
    )
    numbers = (
        ("--k1", 1.5, "BM25 term-frequency saturation"),
        ("--b", 0.75, "BM25 length normalization, 0..1"),
        ("--epsilon", 0.25, "okapi IDF only: the floor for a negative IDF, a share of the mean"),
    )
    for flag, default, text in numbers:
        p.add_argument(flag, type=float, default=default, help=f"{text} (default {default:g})")
    p.add_argument(
        "--idf",
        choices=["okapi", "lucene"],
        default="okapi",
        help="okapi: rank_bm25's IDF with its floor; lucene: always-positive log(1+...) IDF",
    )
    p.add_argument(
        "--title-weight",
        type=float,
        default=0.0,
        help="also score titles as a second BM25 field with this weight (default 0: off)",
    )
    p.add_argument(
        "--stemmer",
        default="english",
        help="Snowball stemmer language, or 'none' (default english)",
    )
    p.add_argument(
        "--stopwords", default="english", help="'english' (scikit-learn's list) or 'none'"
    )
    p.add_argument("--keep-accents", action="store_true", help="do not strip accents from words")
    p.add_argument(
        "--no-vectors",
        action="store_true",
        help="skip training word vectors (no dense or hybrid search; builds faster)",
    )
    p.add_argument(
        "--vector-dim", type=int, default=200, help="word vector dimensions (default 200)"
    )
    p.add_argument(
        "--vector-epochs",
        type=int,
        default=0,
        help="passes over the corpus training the word vectors (default 0: from its size: "
        "40 up to 500,000 analyzed words, fewer above, 5 from 4 million on)",
    )
    p.add_argument(
        "--vector-threads",
        type=int,
        default=0,
        help="threads training the word vectors (default 0: up to 4 cores); 1 gives the "
        "same vectors on every build",
    )
    p.add_argument(
        "--skip-bad",
        action="store_true",
        help="skip bad lines (and report them) instead of stopping",
    )
    p.add_argument(
        "--shards",
        type=int,
        metavar="N",
        default=0,
        help="build N shards of contiguous articles whose searches (BM25, dense, hybrid) "
        "equal one index's; word vectors are trained once over the whole corpus",
    )
    p.add_argument(
        "--ray",
        metavar="ADDRESS",
        help="with --shards: run the build's tasks on this Ray cluster, or 'local' to start "
        "one here (needs the 'cluster' extra; default: in this process)",
    )
    p.add_argument("--json", action="store_true", help="print the summary as JSON")


SHOWN_UNRESOLVED = 5  # unresolved links named in a build summary


def summary(idx: Index, seconds: float, report: ReadReport) -> dict[str, Any]:
    """What a build or an update of `idx` did, for `print_summary`."""
    from retriever.store import folder_size, read_unresolved

    index_dir = idx.path
    counts, build = idx.manifest["counts"], idx.manifest["build"]
    return {
        "index": str(index_dir),
        "index_version": idx.version,
        "articles": counts["articles"],
        "terms": counts["terms"],
        "unresolved_links": build.get("unresolved_links", 0),
        "unresolved_first": [
            {"from": src, "link": name}
            for src, name in read_unresolved(index_dir)[:SHOWN_UNRESOLVED]
        ],
        "skipped_lines": report.skipped,
        "problems": report.problems[:5],
        "seconds": round(seconds, 2),
        "bytes_on_disk": folder_size(index_dir),
    }


def print_summary(s: dict[str, Any], as_json: bool) -> None:
    """A `summary` as JSON, or as lines for people."""
    if as_json:
        print_json(s)
        return
    print(
        f"index {s['index']} (version {s['index_version']}): {s['articles']} articles, "
        f"{s['terms']} terms, {s['unresolved_links']} unresolved links, {s['seconds']} s, "
        f"{human_bytes(s['bytes_on_disk'])} on disk"
    )
    if s["unresolved_first"]:
        shown = "; ".join(f"{u['from']} -> {u['link']!r}" for u in s["unresolved_first"])
        more = s["unresolved_links"] - len(s["unresolved_first"])
        print(f"links naming no article: {shown}" + (f" (and {more} more)" if more > 0 else ""))
        print(f"  all of them: hunchwise index info {s['index']} --unresolved")
    if s["skipped_lines"]:
        print(f"skipped {s['skipped_lines']} bad lines, first ones:")
        for problem in s["problems"]:
            print(f"  {problem}")


def cmd_build(args: argparse.Namespace) -> int:
    """Build an index folder from a corpus file."""
    from retriever import ReadReport, build_index

    started = time.perf_counter()
    if args.shards or args.ray:
        return _build_sharded(args, started)
    report = ReadReport()
    idx = build_index(
        args.corpus,
        args.out,
        k1=args.k1,
        b=args.b,
        epsilon=args.epsilon,
        idf=args.idf,
        title_weight=args.title_weight,
        stemmer=None if args.stemmer == "none" else args.stemmer,
        stopwords=args.stopwords,
        strip_accents=not args.keep_accents,
        vectors=False if args.no_vectors else _vector_options(args),
        skip_bad=args.skip_bad,
        progress=show_progress(args.json),
        report=report,
    )
    print_summary(summary(idx, time.perf_counter() - started, report), args.json)
    return 0


def _vector_options(args: argparse.Namespace) -> dict[str, int]:
    """The build's vector settings from the command line."""
    return {"dim": args.vector_dim, "epochs": args.vector_epochs, "threads": args.vector_threads}


def _build_sharded(args: argparse.Namespace, started: float) -> int:
    """`index build --shards N [--ray ADDRESS]`."""
    from retriever import AnalyzerConfig, BM25Params
    from retriever.sharded import read_manifest
    from retriever.shards import build_sharded

    if args.shards < 1:
        raise ValueError("--shards must be at least 1 (--ray needs --shards N)")
    out = build_sharded(
        args.corpus,
        args.out,
        shards=args.shards,
        ray_address=args.ray,
        analyzer=AnalyzerConfig(
            stemmer=None if args.stemmer == "none" else args.stemmer,
            stopwords=args.stopwords,
            strip_accents=not args.keep_accents,
        ),
        params=BM25Params(
            k1=args.k1, b=args.b, epsilon=args.epsilon, idf=args.idf, title_weight=args.title_weight
        ),
        skip_bad=args.skip_bad,
        vectors=False if args.no_vectors else _vector_options(args),
        progress=show_progress(args.json),
    )
    m = read_manifest(out)
    summary = {
        "index": str(out),
        "index_version": m["index_version"],
        "articles": m["articles"],
        "shards": [s["articles"] for s in m["shards"]],
        "skipped_lines": m["build"]["skipped_lines"],
        "seconds": round(time.perf_counter() - started, 2),
    }
    if args.json:
        print_json(summary)
    else:
        print(
            f"index {out} (version {summary['index_version']}): {summary['articles']} articles "
            f"in {len(summary['shards'])} shards, {summary['skipped_lines']} bad lines "
            f"skipped, {summary['seconds']} s"
        )
    return 0
