"""`hunchwise index tune`: choose BM25's k1, b and IDF variant from labelled logs."""

from __future__ import annotations

import argparse
import json
import shlex
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from reranker.training.bm25tuning import BM25Tuning
    from retriever import BM25Params

from .console import check_k, format_table, print_json, show_progress
from .options import add_log_option, add_reporting_options

K1_DEFAULT = "0.4:2.0:0.2"
B_DEFAULT = "0.3:1.0:0.1"
IDF_DEFAULT = "okapi,lucene"
CORPUS_PLACEHOLDER = "CORPUS_FILE"


def number_list(text: str) -> tuple[float, ...]:
    """'0.5,0.9,1.2' or a range 'START:STOP:STEP' (both ends included) -> the numbers."""
    import numpy as np

    text = text.strip()
    try:
        if ":" in text:
            start, stop, step = (float(v) for v in text.split(":"))
            if not step > 0:
                raise argparse.ArgumentTypeError(f"the step of {text!r} must be positive")
            # Rounded: 0.3 + 7 * 0.1 is 0.9999999999999999, which is not the 1.0 asked for.
            values = np.round(np.arange(start, stop + step / 2, step), 10).tolist()
        else:
            values = [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected numbers like 0.5,0.9,1.2 or a range like 0.4:2.0:0.2, got {text!r}"
        ) from None
    if not values:
        raise argparse.ArgumentTypeError(f"no values in {text!r}: the grid would be empty")
    return tuple(values)


def idf_list(text: str) -> tuple[str, ...]:
    """'okapi,lucene' -> the IDF variants."""
    from retriever.bm25 import IDF_VARIANTS

    values = tuple(v.strip() for v in text.split(",") if v.strip())
    if not values:
        raise argparse.ArgumentTypeError(f"no values in {text!r}: the grid would be empty")
    unknown = [v for v in values if v not in IDF_VARIANTS]
    if unknown:
        raise argparse.ArgumentTypeError(f"unknown IDF variants {unknown}; known: {IDF_VARIANTS}")
    return values


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The options of `index tune`."""
    p.add_argument("--index", type=Path, required=True, help="index folder to tune")
    add_log_option(p)
    p.add_argument("-k", type=int, default=20, help="recall is measured in the top k (default 20)")
    grids = (
        ("--k1", number_list, K1_DEFAULT, "VALUES",
         "k1 values: a list like 0.8,1.2 or a range START:STOP:STEP"),
        ("--b", number_list, B_DEFAULT, "VALUES", "b values, 0..1, as for --k1"),
        ("--idf", idf_list, IDF_DEFAULT, "VARIANTS", "IDF variants to try"),
    )  # fmt: skip
    for flag, parse, default, metavar, text in grids:
        p.add_argument(
            flag,
            type=parse,
            default=parse(default),
            metavar=metavar,
            help=f"{text} (default {default})",
        )
    p.add_argument(
        "--seed", type=int, default=0, help="seed of the split of answers into halves (default 0)"
    )
    p.add_argument(
        "--corpus",
        type=Path,
        default=None,
        help="corpus file for the printed rebuild command (default: the one the index was "
        "built from)",
    )
    p.add_argument("--write", type=Path, default=None, help="save the whole table as JSON here")
    add_reporting_options(p, "the result")


def rebuild_command(
    manifest: dict[str, Any], index_dir: Path, params: BM25Params, corpus: Path | None
) -> tuple[str, list[str]]:
    """The `hunchwise index build` line giving `params` and the index's other settings, and
    notes on what that line cannot say (an unknown corpus, settings without an option)."""
    notes: list[str] = []
    if corpus is None and manifest.get("build", {}).get("corpus"):
        corpus = Path(manifest["build"]["corpus"])
    if corpus is None:
        notes.append(
            f"the index does not record its corpus file (built before this was kept, or "
            f"updated since): put yours in place of {CORPUS_PLACEHOLDER} or pass --corpus"
        )
    argv = ["hunchwise", "index", "build", str(corpus or CORPUS_PLACEHOLDER)]
    argv += ["--out", str(index_dir), "--k1", f"{params.k1:g}", "--b", f"{params.b:g}"]
    argv += ["--idf", params.idf]
    if params.epsilon != 0.25:
        argv += ["--epsilon", f"{params.epsilon:g}"]
    if params.title_weight:
        argv += ["--title-weight", f"{params.title_weight:g}"]
    an = manifest["analyzer"]
    if an.get("stemmer") != "english":
        argv += ["--stemmer", an.get("stemmer") or "none"]
    if an.get("stopwords") == "none":
        argv += ["--stopwords", "none"]
    elif an.get("stopwords") != "english":
        notes.append("the index's own stop-word list has no build option; the line uses none")
        argv += ["--stopwords", "none"]
    if not an.get("strip_accents", True):
        argv.append("--keep-accents")
    vectors = manifest.get("vectors")
    if not vectors:
        argv.append("--no-vectors")
    else:
        if int(vectors["settings"]["dim"]) != 200:
            argv += ["--vector-dim", str(int(vectors["settings"]["dim"]))]
        if int(vectors["settings"].get("threads", 0)) != 0:
            argv += ["--vector-threads", str(int(vectors["settings"]["threads"]))]
    return shlex.join(argv), notes


def _table(t: BM25Tuning) -> str:
    rows = sorted(t.rows, key=lambda r: (-r["recall_at_k"], -r["mrr"], not r["chosen"]))
    return format_table(
        ["k1", "b", "idf", f"recall@{t.k}", "MRR", f"recall@{t.k} tuning half", ""],
        [
            (
                f"{r['k1']:g}",
                f"{r['b']:g}",
                r["idf"],
                f"{r['recall_at_k']:.3f}",
                f"{r['mrr']:.3f}",
                f"{r['tuning_recall_at_k']:.3f}",
                ("<- chosen" if r["chosen"] else "") + (" (current)" if r["current"] else ""),
            )
            for r in rows
        ],
    )


def cmd_tune(args: argparse.Namespace) -> int:
    """Evaluate the grid on the labelled logs, print the table and the rebuild command."""
    from reranker.training import LogReport, read_logs
    from reranker.training.bm25tuning import tune_bm25
    from retriever import load_index
    from retriever.atomicfile import write_text

    check_k(args.k)
    index = load_index(args.index)
    report = LogReport()
    clues = read_logs(args.log, skip_bad=args.skip_bad, report=report)
    t = tune_bm25(
        index,
        clues,
        k=args.k,
        k1s=args.k1,
        bs=args.b,
        idfs=args.idf,
        seed=args.seed,
        progress=show_progress(args.json),
    )
    command, notes = rebuild_command(index.manifest, index.path, t.chosen, args.corpus)
    result = {**t.to_dict(), "rebuild": command, "skipped_lines": report.skipped}
    if args.write is not None:
        write_text(args.write, json.dumps(result, indent=2) + "\n")
    if args.json:
        print_json(result)
        return 0
    print(
        f"{t.n_clues} labelled clues: {t.n_tuning} tuning, {t.n_held_out} held out "
        f"(split by answer, seed {t.seed}); chosen by held-out recall@{t.k}, then MRR"
    )
    if t.unresolved:
        first = "; ".join(f"{u['file']}:{u['line']} {u['answer']!r}" for u in t.unresolved[:3])
        print(f"{len(t.unresolved)} answers name no article of this index, skipped: {first}")
    if t.no_answer:
        print(f"{t.no_answer} clues labelled 'none of these' skipped (no answer to find)")
    if report.skipped:
        print(f"{report.skipped} bad log lines skipped")
    print()
    print(_table(t))
    c, best = t.current, next(r for r in t.rows if r["chosen"])
    print(
        f"\nchosen: k1 {best['k1']:g}, b {best['b']:g}, idf {best['idf']}: held-out "
        f"recall@{t.k} {best['recall_at_k']:.3f}, MRR {best['mrr']:.3f} (the index's own "
        f"k1 {c['k1']:g}, b {c['b']:g}, idf {c['idf']}: {c['recall_at_k']:.3f}, {c['mrr']:.3f})"
    )
    gain = round((best["recall_at_k"] - c["recall_at_k"]) * t.n_held_out)
    print(
        f"that is {gain} more of the {t.n_held_out} held-out clues answered in the top {t.k}"
        + ("; a gain of a clue or two is within the split's noise" if gain <= 2 else "")
    )
    for note in notes:
        print(f"note: {note}")
    if args.write is not None:
        print(f"table written to {args.write}")
    print(f"rebuild with:\n  {command}")
    return 0
