"""Word-vector settings measured on the FOLDOC + Jargon TRAINING clues only.

Run: python -m tests.opendata.vector_curve --out DIR [--set epochs=20 window=10 ...]
     [--weighting idf|none|idf2|sif] [--remove-common] [--pool 100] [--reuse]
Builds the BM25 index once in DIR/index (kept between runs), trains corpus-only vectors with
the given settings (one thread, so the same settings give the same vectors), and prints one
JSON line: the vectors alone (top-1, R@20, R@100 on the 196 training clues, whole and half)
and the hybrid's recall@20 and top-1 per fusion weight, on the training clues split by
answer into tuning and held-out halves as `hunchwise index tune` splits them, with the
weight chosen on the tuning half and scored on the held-out half. The test clues are never
read here. `--weighting sif` weights each word a / (a + p(w)), a = 1e-3, p(w) its share of
the body tokens, and `--remove-common` takes the first principal component of the article
averages out of every article vector (Arora, Liang and Ma 2017, "A simple but tough-to-beat
baseline for sentence embeddings"; either works with any weighting).
"""

from __future__ import annotations

import argparse
import json
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from reranker.candidates import CandidatePolicy, fused_rows, search_pools
from reranker.training.bm25tuning import split_by_answer
from retriever import build_index, load_index
from retriever import vectors as vecs

from .jargon_clues import build_set, truncate

WEIGHTS = (0.3, 0.4, 0.5, 0.6, 0.7, 0.75, 0.8, 0.85, 0.9, 0.95, 1.0)


def _ranks(lists: Sequence[np.ndarray], golds: np.ndarray) -> np.ndarray:
    out = np.zeros(len(golds), dtype=np.int64)
    for i, (rows, g) in enumerate(zip(lists, golds.tolist(), strict=True)):
        hit = np.flatnonzero(np.asarray(rows) == g)
        out[i] = hit[0] + 1 if hit.size else 0
    return out


def _m(r: np.ndarray) -> dict[str, float]:
    return {
        "top1": round(float(np.mean(r == 1)), 4),
        "r20": round(float(np.mean((r > 0) & (r <= 20))), 4),
        "r100": round(float(np.mean(r > 0)), 4),
    }


def sif_weights(folder: Path, manifest: dict[str, Any], words: list[str]) -> np.ndarray:
    """a / (a + p(w)), a = 1e-3, p(w) the word's share of the body tokens (Arora et al.)."""
    counts = vecs.body_counts(folder, manifest)
    tf = np.asarray(counts.sum(axis=0), dtype=np.float64).ravel()
    rows = vecs.term_rows(folder, counts.shape[1], words)
    p = np.zeros(len(words))
    p[rows[rows >= 0]] = tf[rows >= 0] / tf.sum()
    return 1e-3 / (1e-3 + p)


def common_removed(
    counts: Any, rows: np.ndarray, wordvec: np.ndarray, weight: np.ndarray
) -> np.ndarray:
    """Unit article vectors after taking the first principal component (uncentred, as in
    Arora et al.) of the weighted word-vector averages out of each. A clue's vector needs
    no change: its dot product with a vector orthogonal to the component is the same with
    or without its own component, and a clue's scale changes no ranking."""
    has = np.flatnonzero(rows >= 0)
    words = wordvec[rows[has]].astype(np.float64) * weight[rows[has], None]
    c = counts[:, has].astype(np.float64)
    x = np.asarray(c @ words) / np.maximum(np.asarray(c.sum(axis=1)).ravel(), 1)[:, None]
    u = np.linalg.eigh(x.T @ x)[1][:, -1]
    x -= np.outer(x @ u, u)
    norm = np.linalg.norm(x, axis=1, keepdims=True)
    return np.divide(x, norm, out=np.zeros_like(x), where=norm > 0).astype(np.float32)


def measure(
    out: Path,
    settings: dict[str, Any],
    weighting: str,
    pool: int,
    reuse: bool = False,
    remove_common: bool = False,
) -> dict[str, Any]:
    records, train, _test, _ = build_set()
    folder = out / "index"
    if not (folder / "manifest.json").exists():
        build_index(records, folder, vectors=False)
    idx = load_index(folder)
    s = vecs.VectorSettings.from_dict({"threads": 1, **settings})
    t = time.perf_counter()
    if not reuse:
        vecs.add_to_folder(folder, idx.analyzer, s)
    seconds = time.perf_counter() - t
    if weighting != "idf" or reuse or remove_common:
        # The article vectors again from the stored word vectors, with the asked weighting.
        idx = load_index(folder)
        assert idx.dense is not None
        s = idx.dense.vectors.settings
        words = idx.dense.vectors.words()
        idf = vecs.folder_idf_weights(folder, idx.manifest, words)
        weight = {"idf": idf, "none": np.ones_like(idf), "idf2": idf**2}.get(weighting)
        if weighting == "sif":
            weight = sif_weights(folder, idx.manifest, words)
        assert weight is not None
        wordvec = np.array(idx.dense.vectors.wordvec)
        del idx
        vecs.store.save_array(folder, vecs.WORDVEC_WEIGHT, weight.astype(np.float32))
        manifest = vecs.store.read_manifest(folder)
        manifest["vectors"].update(
            vecs.write_article_vectors(folder, manifest, words, wordvec, weight, s)
        )
        if remove_common:
            rows = vecs.term_rows(folder, int(manifest["counts"]["terms"]), words)
            counts = vecs.body_counts(folder, manifest)
            docvec = common_removed(counts, rows, wordvec, weight).astype(s.dtype)
            vecs.store.save_array(folder, vecs.DOCVEC, docvec)
            if manifest["vectors"]["ann"] is not None:
                from retriever import ann

                manifest["vectors"]["ann"] = ann.build(folder, docvec, s)
        vecs.store.write_json(folder / vecs.store.MANIFEST, manifest)
    idx = load_index(folder)
    golds = np.array([idx.resolver.row(c.answer) for c in train], dtype=np.int64)
    tuning, held = split_by_answer(golds, 0)
    result: dict[str, Any] = {
        "settings": {**settings, "weighting": weighting, "common": remove_common, "pool": pool},
        "seconds": round(seconds, 1),
        "words": idx.manifest["vectors"]["words"],
    }
    for share in (1.0, 0.5):
        key = f"{share:.0%}"
        tokens = idx.analyzer.tokens_many([truncate(c.text, share) for c in train])
        pools = search_pools(idx, tokens, pool, policy=CandidatePolicy("hybrid", 1.0, pool))
        alone = _ranks([p.dense_rows for p in pools], golds)
        bm25 = _ranks([p.bm25_rows for p in pools], golds)
        by_w: dict[float, dict[str, Any]] = {}
        for w in WEIGHTS:
            pol = CandidatePolicy("hybrid", w, pool)
            r = _ranks([fused_rows(p, 20, pol) for p in pools], golds)
            by_w[w] = {
                "all": _m(r),
                "tuning_r20": float(np.mean(r[tuning] > 0)),
                "held_r20": float(np.mean(r[held] > 0)),
                "held_top1": float(np.mean(r[held] == 1)),
            }
        best = max(WEIGHTS, key=lambda w: (by_w[w]["tuning_r20"], w))
        result[key] = {
            "vectors": _m(alone),
            "bm25": _m(bm25),
            "bm25_held_r20": float(np.mean((bm25[held] > 0) & (bm25[held] <= 20))),
            "union_r100": round(float(np.mean((alone > 0) | (bm25 > 0))), 4),
            "hybrid_r20_by_w": {w: v["all"]["r20"] for w, v in by_w.items()},
            "chosen_w": best,
            "chosen_held_r20": by_w[best]["held_r20"],
        }
    return result


def main(argv: Sequence[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--out", type=Path, required=True)
    ap.add_argument("--set", nargs="*", default=[], help="vector settings, name=value")
    ap.add_argument("--weighting", default="idf", choices=("idf", "none", "idf2", "sif"))
    ap.add_argument("--remove-common", action="store_true", help="see the notes above")
    ap.add_argument("--pool", type=int, default=100)
    ap.add_argument("--reuse", action="store_true", help="score the vectors DIR holds")
    args = ap.parse_args(argv)
    settings: dict[str, Any] = {}
    for item in args.set:
        name, value = item.split("=", 1)
        settings[name] = float(value) if "." in value or "e" in value else int(value)
    args.out.mkdir(parents=True, exist_ok=True)
    got = measure(args.out, settings, args.weighting, args.pool, args.reuse, args.remove_common)
    print(json.dumps(got))


if __name__ == "__main__":
    main()
