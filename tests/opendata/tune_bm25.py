"""BM25's parameters chosen by `hunchwise index tune` on the FOLDOC + Jargon training clues.

Run: python -m tests.opendata.tune_bm25 [--out DIR]
Writes the training clues as a labelled log and the FOLDOC articles as a corpus file,
builds the default index, runs `hunchwise index tune` on the training clues, rebuilds with
the command it prints, and scores both indexes on the test clues (never seen by the tuning).
"""

from __future__ import annotations

import argparse
import json
import shlex
import subprocess
import sys
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from retriever import load_index

from .evaluate import DEPTH, _metrics
from .jargon_clues import build_set, truncate


def hunchwise(*args: str) -> str:
    """Run the console script; its standard output."""
    cli = [sys.executable, "-m", "api.cli"]
    return subprocess.run([*cli, *args], check=True, capture_output=True, text=True).stdout


def run(out: Path) -> dict[str, Any]:
    """Build, tune, rebuild and score; returns the tuning table and both indexes' figures."""
    records, train, test, _ = build_set()
    corpus, labels = out / "foldoc.jsonl", out / "train_labels.jsonl"
    corpus.write_text("".join(json.dumps(r) + "\n" for r in records))
    labels.write_text(
        "".join(json.dumps({"clue": c.text, "answer": c.answer}) + "\n" for c in train)
    )
    hunchwise("index", "build", str(corpus), "--out", str(out / "default"), "--no-vectors")
    tuned_dir = out / "tuned"
    hunchwise("index", "build", str(corpus), "--out", str(tuned_dir), "--no-vectors")
    printed = hunchwise(
        "index", "tune", "--index", str(tuned_dir), "--log", str(labels),
        "--write", str(out / "grid.json"),
    )  # fmt: skip
    command = printed.split("rebuild with:\n", 1)[1].strip()
    hunchwise(*shlex.split(command)[1:])
    answers = [c.answer for c in test]
    table: dict[str, dict[str, dict[str, float]]] = {}
    for name in ("default", "tuned"):
        idx = load_index(out / name)
        p = idx.params
        label = f"BM25 (k1 {p.k1:g}, b {p.b:g}, {p.idf})"
        for share in (1.0, 0.5):
            clues = [truncate(c.text, share) for c in test]
            ranked = [[h.doc_id for h in hs] for hs in idx.search_many(clues, DEPTH)]
            table.setdefault(label, {})[f"{share:.0%}"] = _metrics(ranked, answers)
    return {"printed": printed, "table": table}


def main(argv: Sequence[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--out", type=Path, default=None, help="folder for the files (default temp)")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        out = args.out or Path(tmp)
        out.mkdir(parents=True, exist_ok=True)
        result = run(out)
        print(result["printed"])
        print("| system | words | top-1 | R@20 | R@100 | MRR |")
        print("| --- | --- | --- | --- | --- | --- |")
        for name, by_share in result["table"].items():
            for share, m in by_share.items():
                print(
                    f"| {name} | {share} | {m['top1']:.3f} | {m['r20']:.3f} | {m['r100']:.3f} "
                    f"| {m['mrr']:.3f} |"
                )


if __name__ == "__main__":
    main()
