"""BM25's parameters chosen by `hunchwise index tune` on the FOLDOC + Jargon training clues.

Run: python -m tests.opendata.tune_bm25 [--out DIR]
Writes the training clues as a labelled log and the FOLDOC articles as a corpus file,
builds the default index, runs `hunchwise index tune` on the training clues, rebuilds with
the command it prints, and scores both indexes on the test clues (never seen by the tuning).
"""

from __future__ import annotations

import json
import shlex
import subprocess
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from retriever import load_index

from .evaluate import DEPTH, _metrics, retrieval_rows, run_in_folder
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
    result = run_in_folder(argv, __doc__, run)
    print(result["printed"])
    print("\n".join(retrieval_rows(result["table"])))


if __name__ == "__main__":
    main()
