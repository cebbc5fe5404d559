"""The reranker on the FOLDOC + Jargon set: BM25 candidates against hybrid ones.

Run: python -m tests.opendata.rerank [--out DIR] [--index DIR]
Writes the training clues as a labelled log, builds the default index (`hunchwise index
build` defaults, vectors included), trains with `reranker.training.train` as `hunchwise
train` does: BM25 candidates (`--candidates bm25`), hybrid candidates with the index's own
vectors (`--no-refine-vectors`) and the default (hybrid, vectors refined on the labels);
each model is then scored on the test clues with only what training stored. Prints top-1,
recall@20 (the answer among the model's candidates) and MRR over them.
"""

from __future__ import annotations

import argparse
import json
import shutil
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from reranker import rank_clues
from reranker.candidates import CandidatePolicy, dense_of, fused_rows, search_pools
from reranker.training import train
from retriever import Index, build_index, load_index

from .evaluate import DEPTH, _metrics, retrieval_rows
from .jargon_clues import Clue, build_set, truncate

SHARES = (1.0, 0.5)


def score(
    index: Index, model: Any, test: Sequence[Clue], top: int | None = None
) -> dict[str, dict[str, float]]:
    """Top-1, recall@k and MRR of the model's ranking of the test clues, per share; with
    `top`, only the first `top` of the model's k reranked candidates count (recall@top)."""
    out = {}
    for share in SHARES:
        ranked = rank_clues(index, model, [truncate(c.text, share) for c in test])
        ranks = []
        for r, c in zip(ranked, test, strict=True):
            ids = [x.doc_id for x in r.candidates][:top]
            ranks.append(ids.index(c.answer) + 1 if c.answer in ids else 0)
        a = np.array(ranks)
        out[f"{share:.0%}"] = {
            "top1": float(np.mean(a == 1)),
            "r20": float(np.mean(a > 0)),
            "mrr": float(np.mean(np.where(a > 0, 1.0 / np.maximum(a, 1), 0.0))),
        }
    return out


def retrieval(index: Index, policy: CandidatePolicy, test: Sequence[Clue]) -> dict[str, Any]:
    """Before the reranker: the policy's vectors alone and its fused list (top 100 each)."""
    dense = dense_of(index, policy)
    if dense is None:
        raise RuntimeError("the evaluation index has no vectors")
    answers = [c.answer for c in test]
    rows: dict[str, Any] = {}
    for share in SHARES:
        tokens = index.analyzer.tokens_many([truncate(c.text, share) for c in test])
        pools = search_pools(index, tokens, DEPTH, policy=policy)
        alone = [index.ids.take(p.dense_rows) for p in pools]
        fused = [index.ids.take(fused_rows(p, DEPTH, policy)) for p in pools]
        rows.setdefault("vectors alone", {})[f"{share:.0%}"] = _metrics(alone, answers)
        rows.setdefault(f"hybrid, w {policy.weight}", {})[f"{share:.0%}"] = _metrics(fused, answers)
    return rows


def run(
    out: Path,
    systems: Sequence[str] = ("bm25", "hybrid", "refined"),
    prebuilt: Path | None = None,
) -> dict[str, Any]:
    """Train each system's model on the training clues and score it on the test clues.

    `prebuilt`: a FOLDOC index built before with the defaults, copied into `out` (training
    writes its refined vectors into the index folder) instead of building one (~20 min).
    """
    records, train_clues, test, counts = build_set()
    log = out / "train_labels.jsonl"
    log.write_text(
        "".join(json.dumps({"clue": c.text, "answer": c.answer}) + "\n" for c in train_clues)
    )
    if prebuilt is None:
        index = build_index(records, out / "index")
    else:
        shutil.copytree(prebuilt, out / "index")
        index = load_index(out / "index")
    options = {
        "bm25": {"candidates": "bm25"},
        "hybrid": {"refine_vectors": False},
        "refined": {},
    }
    table: dict[str, Any] = {}
    before: dict[str, Any] = {}
    fusion: dict[str, Any] = {}
    for name in systems:
        res = train(index, [log], out / f"model-{name}.json", **options[name])
        c = res.artifact["candidates"]
        if name != "bm25":
            kind = "refined" if c["vectors"] else "corpus"
            for row, by_share in retrieval(index, res.model.candidates, test).items():
                before[f"{row} ({kind} vectors)"] = by_share
        label = {
            "bm25": "BM25 + reranker",
            "hybrid": f"hybrid (w {c['weight']}, corpus vectors) + reranker",
            "refined": f"hybrid (w {c['weight']}, refined vectors) + reranker",
        }[name]
        table[label] = score(index, res.model, test)
        if name != "bm25":
            fusion[label] = res.artifact["training"].get("fusion_tuning")
    epochs = index.manifest["vectors"]["settings"]["epochs"]
    return {
        "table": table,
        "retrieval": before,
        "counts": counts,
        "fusion": fusion,
        "epochs": epochs,
    }


def main(argv: Sequence[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--out", type=Path, default=None, help="folder for the files (default temp)")
    ap.add_argument("--index", type=Path, default=None, help="a FOLDOC index built before")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        out = args.out or Path(tmp)
        out.mkdir(parents=True, exist_ok=True)
        result = run(out, prebuilt=args.index)
    print(f"index vectors: {result['epochs']} epochs")
    for label, rows in result["fusion"].items():
        print(label, "fusion tuning on the training clues:", json.dumps(rows))
    print("\n".join(retrieval_rows(result["retrieval"])))
    print()
    print("| candidates | words | top-1 | recall@20 | MRR |")
    print("| --- | --- | --- | --- | --- |")
    for name, by_share in result["table"].items():
        for share, m in by_share.items():
            print(f"| {name} | {share} | {m['top1']:.3f} | {m['r20']:.3f} | {m['mrr']:.3f} |")


if __name__ == "__main__":
    main()
