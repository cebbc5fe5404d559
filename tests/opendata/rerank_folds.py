"""The reranker's candidate policies compared on the FOLDOC + Jargon TRAINING clues only.

Run: python -m tests.opendata.rerank_folds --index DIR [--weights 1.0 0.85 grid] [--k 100]
The 196 training clues are split by answer into two halves (as `hunchwise index tune`
splits them); a model is trained on each half (`reranker.training.train`, the index's own
vectors, no refining) and scored on the other, so every training clue is scored once by a
model that never saw its answer. Systems: BM25 candidates, and hybrid candidates with the
fusion weight fixed or chosen by `train` from its grid ("grid"). The test clues are never
read. Prints top-1, recall@20 and MRR per system, whole clues and their first half. With
`--k N` the models are trained on N candidates per clue (a deeper pool for the reranker)
and only the top 20 of their ranking count, so recall@20 stays comparable across k.
"""

from __future__ import annotations

import argparse
import importlib
import json
import tempfile
from collections.abc import Sequence
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np

from reranker.training.bm25tuning import split_by_answer
from reranker.training.fusion import tune_fusion
from retriever import load_index

from .jargon_clues import Clue, build_set
from .rerank import score

# The module (the package re-exports its function under the same name).
train_module: Any = importlib.import_module("reranker.training.train")


def _log(path: Path, clues: Sequence[Clue]) -> Path:
    path.write_text("".join(json.dumps({"clue": c.text, "answer": c.answer}) + "\n" for c in clues))
    return path


def run(index_dir: Path, weights: Sequence[str], out: Path, k: int = 20) -> dict[str, Any]:
    """Each system's two-fold scores over the training clues."""
    _, train_clues, _, _ = build_set()
    index = load_index(index_dir)
    golds = np.array([index.resolver.row(c.answer) for c in train_clues], dtype=np.int64)
    halves = split_by_answer(golds, 0)
    systems: dict[str, dict[str, Any]] = {f"BM25, k {k}": {"candidates": "bm25", "k": k}}
    for w in weights:
        systems[f"hybrid w {w}, k {k}"] = {"refine_vectors": False, "weight": w, "k": k}
    table: dict[str, Any] = {}
    for name, opts in systems.items():
        sums: dict[str, dict[str, float]] = {}
        for f, (fit_on, score_on) in enumerate((halves, halves[::-1])):
            log = _log(out / f"fold{f}.jsonl", [train_clues[i] for i in fit_on])
            w = opts.get("weight")
            chosen = train_module.tune_fusion
            if w not in (None, "grid"):
                train_module.tune_fusion = partial(tune_fusion, weights=(float(w),))
            try:
                kwargs = {k: v for k, v in opts.items() if k != "weight"}
                res = train_module.train(index, [log], out / f"model-{f}.json", **kwargs)
            finally:
                train_module.tune_fusion = chosen
            got = score(index, res.model, [train_clues[i] for i in score_on], top=20)
            for share, m in got.items():
                acc = sums.setdefault(share, {"top1": 0.0, "r20": 0.0, "mrr": 0.0})
                for key, value in m.items():
                    acc[key] += value * len(score_on) / len(train_clues)
            sums.setdefault("weights", {})[f"fold{f}"] = res.artifact["candidates"]["weight"]
        table[name] = sums
        print(name, json.dumps(sums), flush=True)
    return table


def main(argv: Sequence[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--index", type=Path, required=True, help="a FOLDOC index with vectors")
    ap.add_argument("--weights", nargs="*", default=["1.0", "grid"])
    ap.add_argument("--k", type=int, default=20, help="candidates the models are trained on")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        run(args.index, args.weights, Path(tmp), args.k)


if __name__ == "__main__":
    main()
