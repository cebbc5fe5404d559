"""Sub-commands `index build|info|add|remove|tune|copy-vectors` and `search`."""

from __future__ import annotations

import argparse
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any, cast

if TYPE_CHECKING:
    from retriever import Index
    from retriever.sharded import ShardedIndex

from . import index_build, index_tune, index_vectors
from .console import check_k, format_table, human_bytes, print_json, show_progress
from .options import add_filter_option, add_reporting_options


def register(sub: argparse._SubParsersAction) -> None:
    """Add the index and search sub-commands."""
    index = sub.add_parser("index", help="build, inspect and update a BM25 index folder")
    isub = index.add_subparsers(dest="index_command", metavar="ACTION", required=True)

    p = isub.add_parser(
        "build", help="index a corpus file (.jsonl, .csv, .tsv, .parquet) into a folder"
    )
    index_build.add_arguments(p)
    p.set_defaults(func=index_build.cmd_build)

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


def cmd_info(args: argparse.Namespace) -> int:
    """Print an index's manifest."""
    from retriever import load_index, store
    from retriever.store import folder_size

    if store.is_sharded(Path(args.index)):
        return _sharded_info(args)
    idx = load_index(args.index)
    if args.unresolved:
        from retriever.store import read_unresolved

        return _print_links(read_unresolved(idx.path), args.json)
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
        _kernel_row(),
    ]
    print(format_table(["field", "value"], rows))
    return 0


def _print_links(links: list[tuple[str, str]], as_json: bool) -> int:
    """`index info --unresolved`: (article id, link text) pairs, tab-separated or as JSON."""
    if as_json:
        print_json([{"from": src, "link": name} for src, name in links])
    else:
        for src, name in links:
            print(f"{src}\t{name}")
    return 0


def _kernel_row() -> tuple[str, str]:
    from retriever import scoring

    return (
        "query kernel",
        "compiled" if scoring.compiled() else "numpy (retriever._kernels not built)",
    )


def _sharded_info(args: argparse.Namespace) -> int:
    """`index info` on a sharded folder: the corpus's figures, then one row per shard."""
    from retriever import load_index
    from retriever.store import folder_size, read_unresolved

    sharded = cast("ShardedIndex", load_index(args.index, sharded=True))
    shards = [cast("Index", s) for s in sharded.shards]
    if args.unresolved:
        return _print_links([pair for s in shards for pair in read_unresolved(s.path)], args.json)
    top = sharded.manifest
    parts = [s.manifest for s in shards]
    if args.json:
        print_json({**top, "shard_manifests": parts})
        return 0
    counts = [m["counts"] for m in parts]
    rows = [
        ("index version", top["index_version"]),
        ("created", top["created_at"]),
        ("articles", top["articles"]),
        ("shards", len(parts)),
        ("terms", counts[0]["terms"]),  # the corpus's vocabulary, the same in every shard
        ("postings", sum(c["body_postings"] for c in counts)),
        ("mean length", round(counts[0]["avgdl"], 1)),  # the corpus's, every shard uses it
        ("qualified titles", sum(c["qualified_titles"] for c in counts)),
        ("unresolved links", sum(m["build"].get("unresolved_links", 0) for m in parts)),
        ("bm25", ", ".join(f"{k}={v}" for k, v in top["bm25"].items())),
        ("analyzer", ", ".join(f"{k}={v}" for k, v in top["analyzer"].items() if k != "extra")),
        ("statistics sha256", top["stats"]["sha256"][:16] + "..."),
        ("size on disk", human_bytes(folder_size(Path(args.index)))),
        ("weights", parts[0]["weights"]),
        _kernel_row(),
    ]
    print(format_table(["field", "value"], rows))
    print()
    print(
        format_table(
            ["shard", "first row", "articles", "postings", "size on disk"],
            [
                (
                    entry["folder"],
                    entry["first_row"],
                    entry["articles"],
                    m["counts"]["body_postings"],
                    human_bytes(folder_size(s.path)),
                )
                for entry, m, s in zip(top["shards"], parts, shards, strict=True)
            ],
        )
    )
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
    index_build.print_summary(
        index_build.summary(idx, time.perf_counter() - started, report), args.json
    )
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
