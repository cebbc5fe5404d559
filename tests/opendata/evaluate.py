"""Evaluate BM25, word vectors and the hybrid on the FOLDOC + Jargon File set.

Run: python -m tests.opendata.evaluate [--out DIR] [--dim 200] [--epochs 0]
Prints top-1, recall@20, recall@100 and MRR (over the top 100) of each system on the test
split, with whole clues and with their first half.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from retriever import Index, build_index

from .jargon_clues import build_set, truncate

DEPTH = 100


def _metrics(ranked: Sequence[Sequence[str]], answers: Sequence[str]) -> dict[str, float]:
    ranks = []
    for ids, answer in zip(ranked, answers, strict=True):
        ids = list(ids)
        ranks.append(ids.index(answer) + 1 if answer in ids else 0)
    r = np.array(ranks)
    hit = r > 0
    return {
        "top1": float(np.mean(r == 1)),
        "r20": float(np.mean(hit & (r <= 20))),
        "r100": float(np.mean(hit)),
        "mrr": float(np.mean(np.where(hit, 1.0 / np.maximum(r, 1), 0.0))),
    }


def systems(default: Index, tuned: Index, clues: Sequence[str]) -> dict[str, list[list[str]]]:
    """Each system's ranked article ids for the clues."""
    out: dict[str, list[list[str]]] = {}
    out["BM25 (k1 1.5, b 0.75)"] = [
        [h.doc_id for h in hs] for hs in default.search_many(clues, DEPTH)
    ]
    out["BM25 (k1 0.6, b 1.0)"] = [[h.doc_id for h in hs] for hs in tuned.search_many(clues, DEPTH)]
    dense = default.dense
    if dense is None:
        raise RuntimeError("the evaluation index has no vectors")
    qv = [
        dense.vectors.query_vector(*default.term_ids(t))
        for t in default.analyzer.tokens_many(clues)
    ]
    out["vectors alone"] = [default.ids.take(rows) for rows, _ in dense.search(qv, DEPTH)]
    hybrid = default.search_hybrid_many(clues, DEPTH)
    out["hybrid (min-max, w 0.5)"] = [[h.doc_id for h in r.hits] for r in hybrid]
    rrf = default.search_hybrid_many(clues, DEPTH, fusion="rrf")
    out["hybrid (RRF)"] = [[h.doc_id for h in r.hits] for r in rrf]
    # Every candidate of both pools (up to 200), as a reranker would see them.
    union = default.search_hybrid_many(clues, 2 * DEPTH)
    out["union of both top-100 lists"] = [[h.doc_id for h in r.hits] for r in union]
    return out


def evaluate(out_dir: Path, vectors: dict[str, Any] | None = None) -> dict[str, Any]:
    """Build both indexes in `out_dir`, score every system; returns the table and sizes."""
    records, _train, test, counts = build_set()
    t = time.perf_counter()
    tuned = build_index(records, out_dir / "tuned", k1=0.6, b=1.0, vectors=False)
    plain_seconds = time.perf_counter() - t
    t = time.perf_counter()
    default = build_index(records, out_dir / "default", vectors=vectors or True)
    vec_seconds = time.perf_counter() - t
    table: dict[str, dict[str, dict[str, float]]] = {}
    answers = [c.answer for c in test]
    for share in (1.0, 0.5):
        clues = [truncate(c.text, share) for c in test]
        for name, ranked in systems(default, tuned, clues).items():
            table.setdefault(name, {})[f"{share:.0%}"] = _metrics(ranked, answers)
    return {
        "table": table,
        "counts": counts,
        "build_seconds": {"bm25 only": plain_seconds, "with vectors": vec_seconds},
        "vectors": default.manifest["vectors"],
    }


def retrieval_rows(table: dict[str, dict[str, dict[str, float]]]) -> list[str]:
    """A Markdown table of top-1, R@20, R@100 and MRR per system and share of words."""
    lines = [
        "| system | words | top-1 | R@20 | R@100 | MRR |",
        "| --- | --- | --- | --- | --- | --- |",
    ]
    for name, by_share in table.items():
        for share, m in by_share.items():
            lines.append(
                f"| {name} | {share} | {m['top1']:.3f} | {m['r20']:.3f} | {m['r100']:.3f} "
                f"| {m['mrr']:.3f} |"
            )
    return lines


def run_in_folder(argv: Sequence[str] | None, doc: str | None, run: Any) -> Any:
    """Parse `--out` (a folder to keep the files in; default a temporary one) and return
    `run(folder)`."""
    ap = argparse.ArgumentParser(description=doc)
    ap.add_argument("--out", type=Path, default=None, help="folder for the files (default temp)")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        out = args.out or Path(tmp)
        out.mkdir(parents=True, exist_ok=True)
        return run(out)


def format_table(result: dict[str, Any]) -> str:
    """The result as a Markdown table, sizes underneath."""
    lines = retrieval_rows(result["table"])
    c = result["counts"]
    lines.append(
        f"\n{c['articles']} FOLDOC articles; {c['jargon_entries']} Jargon entries, "
        f"{c['matched']} matching a FOLDOC title or alias, {c['dropped_overlap']} dropped for "
        f"sharing {6}+ consecutive tokens with the answer, {c['empty']} too short once masked; "
        f"{c['clues']} clues: {c['train']} train, {c['test']} test (split by answer)."
    )
    b, v = result["build_seconds"], result["vectors"]
    lines.append(
        f"Build: {b['bm25 only']:.1f} s without vectors, {b['with vectors']:.1f} s with "
        f"({v['words']} words, {v['settings']['dim']}-d, {v['settings']['epochs']} epochs, "
        f"vectors {v['seconds']:.0f} s)."
    )
    return "\n".join(lines)


def main(argv: Sequence[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--out", type=Path, default=None, help="folder for the indexes (default temp)")
    ap.add_argument("--dim", type=int, default=200)
    ap.add_argument("--epochs", type=int, default=0, help="0: from the corpus's size (default)")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        out = args.out or Path(tmp)
        print(format_table(evaluate(out, {"dim": args.dim, "epochs": args.epochs})))


if __name__ == "__main__":
    main()
