"""Sub-commands `index build|info|add|remove|tune|copy-vectors` and `search`."""

from __future__ import annotations

import argparse
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from retriever import Index, ReadReport
    from retriever.sharded import ShardedIndex

from . import index_tune, index_vectors
from .console import check_k, format_table, human_bytes, print_json, show_progress
from .options import add_filter_option, add_reporting_options


def register(sub: argparse._SubParsersAction) -> None:
    """Add the index and search sub-commands."""
    index = sub.add_parser("index", help="build, inspect and update a BM25 index folder")
    isub = index.add_subparsers(dest="index_command", metavar="ACTION", required=True)

    p = isub.add_parser(
        "build", help="index a corpus file (.jsonl, .csv, .tsv, .parquet) into a folder"
    )
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
    p.set_defaults(func=cmd_build)

    p = isub.add_parser("info", help="show what an index folder holds")
    p.add_argument("index", type=Path, help="index folder")
    p.add_argument("--json", action="store_true", help="print the manifest as JSON")
    p.add_argument(
        "--unresolved",
        action="store_true",
        help="list every link that names no article (article id, then the link text)",
    )
    p.set_defaults(func=cmd_info)

    p = isub.add_parser("add", help="add or replace (same id) articles in an index")
    p.add_argument("index", type=Path, help="index folder to update")
    p.add_argument("corpus", type=Path, help="file of articles to add or replace")
    add_reporting_options(p, "the summary", "lines")
    p.set_defaults(func=cmd_add)

    p = isub.add_parser("remove", help="remove articles from an index by id")
    p.add_argument("index", type=Path, help="index folder to update")
    p.add_argument("ids", nargs="+", metavar="ID", help="article ids to remove")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.set_defaults(func=cmd_remove)

    p = isub.add_parser(
        "tune", help="choose BM25's k1, b and IDF variant from labelled logs by held-out recall"
    )
    index_tune.add_arguments(p)
    p.set_defaults(func=index_tune.cmd_tune)

    p = isub.add_parser(
        "copy-vectors",
        help="copy a model's refined word vectors from the index it was trained on into "
        "every shard of a sharded index, for serving it there",
    )
    index_vectors.add_arguments(p)
    p.set_defaults(func=index_vectors.cmd_copy_vectors)

    p = sub.add_parser("search", help="BM25 candidates for a clue")
    p.add_argument("index", type=Path, help="index folder")
    p.add_argument("clue", help="clue text (quote it)")
    p.add_argument("-k", type=int, default=10, help="how many candidates (default 10)")
    p.add_argument("--json", action="store_true", help="print hits as JSON")
    add_filter_option(p)
    p.set_defaults(func=cmd_search)


SHOWN_UNRESOLVED = 5  # unresolved links named in a build summary


def _summary(idx: Index, seconds: float, report: ReadReport) -> dict[str, Any]:
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


def _print_summary(s: dict[str, Any], as_json: bool) -> None:
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
    _print_summary(_summary(idx, time.perf_counter() - started, report), args.json)
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


def cmd_info(args: argparse.Namespace) -> int:
    """Print an index's manifest."""
    from retriever import load_index, scoring
    from retriever.store import folder_size

    idx = load_index(args.index)
    if args.unresolved:
        from retriever.store import read_unresolved

        links = read_unresolved(idx.path)
        if args.json:
            print_json([{"from": src, "link": name} for src, name in links])
        else:
            for src, name in links:
                print(f"{src}\t{name}")
        return 0
    if args.json:
        print_json(idx.manifest)
        return 0
    m = idx.manifest
    rows = [
        ("index version", m["index_version"]),
        ("created", m["created_at"]),
        ("articles", m["counts"]["articles"]),
        ("terms", m["counts"]["terms"]),
        ("postings", m["counts"]["body_postings"]),
        ("mean length", round(m["counts"]["avgdl"], 1)),
        ("qualified titles", m["counts"]["qualified_titles"]),
        ("unresolved links", m["build"].get("unresolved_links", 0)),
        ("bm25", ", ".join(f"{k}={v}" for k, v in m["bm25"].items())),
        ("analyzer", ", ".join(f"{k}={v}" for k, v in m["analyzer"].items() if k != "extra")),
        ("size on disk", human_bytes(folder_size(Path(args.index)))),
        ("weights", m["weights"]),
        (
            "query kernel",
            "compiled" if scoring.compiled() else "numpy (retriever._kernels not built)",
        ),
    ]
    print(format_table(["field", "value"], rows))
    return 0


def cmd_add(args: argparse.Namespace) -> int:
    """Add or replace articles."""
    return _update(args, add=args.corpus, skip_bad=args.skip_bad)


def cmd_remove(args: argparse.Namespace) -> int:
    """Remove articles by id."""
    return _update(args, remove=args.ids)


def _update(args: argparse.Namespace, **change: Any) -> int:
    from retriever import ReadReport, update_index

    started = time.perf_counter()
    report = ReadReport()
    idx = update_index(args.index, progress=show_progress(args.json), report=report, **change)
    _print_summary(_summary(idx, time.perf_counter() - started, report), args.json)
    return 0


def cmd_search(args: argparse.Namespace) -> int:
    """Print BM25 candidates for one clue."""
    from retriever import load_index
    from retriever.sharded import ShardedIndex
    from retriever.shardview import ShardedView

    check_k(args.k)
    if not args.clue.strip():
        raise ValueError("the clue is empty; give the words to search for (quote them)")
    idx = load_index(args.index, sharded=True)
    if args.filter is None:
        hits = idx.search(args.clue, k=args.k)
    else:
        # A sharded folder is read as one index (ShardedView), so the filter is typed over
        # the whole corpus as the unsharded index types it, each shard searching its part.
        one = ShardedView(args.index) if isinstance(idx, ShardedIndex) else idx
        mask = one.filter_mask(args.filter)
        hits = one.search_tokens(one.analyzer.tokens(args.clue), args.k, allowed=mask)
    if args.json:
        print_json(
            [{"rank": h.rank, "id": h.doc_id, "title": h.title, "score": h.score} for h in hits]
        )
        return 0
    if not hits:
        print(f"no candidates: {_why_nothing(idx, args.clue)}")
        return 0
    print(
        format_table(
            ["rank", "id", "title", "bm25"], [(h.rank, h.doc_id, h.title, h.score) for h in hits]
        )
    )
    return 0


def _why_nothing(idx: Index | ShardedIndex, clue: str) -> str:
    """Why a non-empty clue found no candidates, in the analyzer's terms."""
    if not idx.analyzer.words(clue):
        return (
            "the clue has no searchable words after analysis "
            "(a word is two or more letters or digits)"
        )
    if not idx.analyzer.tokens(clue):
        return "the clue has only stop words, so no searchable words after analysis"
    return "none of the clue's words is in the index"
