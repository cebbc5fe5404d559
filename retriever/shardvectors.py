"""Word vectors for a sharded index: trained once over the whole corpus, article vectors per shard.

gensim's word2vec needs every sentence, so the driver trains it once, streaming every shard's
stored articles in row order (the very lines a single build trains on, so on one thread the
same vectors come out). Each word's weight is its IDF over the whole corpus's body document
frequencies (the reduced statistics of pass 1), as a single build computes it. The words,
their vectors and weights are written once into the sharded folder (`word_vectors/`); pass 3
then gives every shard a copy and its articles' vectors, one task per shard, in the same
files and manifest entry as an unsharded index, so each shard opens as an ordinary `Index`
with dense search. An article's vector depends only on its own text and these shared
arrays, so it equals the single build's bit for bit. `copy_generations` gives every shard a
vector generation (refined vectors a model names) of the unsharded index it was trained on.
"""

from __future__ import annotations

import itertools
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from tqdm.auto import tqdm

from . import columns, sharded, store, vecgen
from . import vectors as vecs
from .analyzer import Analyzer
from .errors import IndexFormatError
from .postings import CorpusStats

WORDS_FOLDER = "word_vectors"


def train_over_shards(
    top: Path,
    shards: list[tuple[Path, int]],
    analyzer: Analyzer,
    settings: vecs.VectorSettings,
    stats: CorpusStats,
    progress: bool = False,
) -> dict[str, Any]:
    """Train word vectors on the articles of `shards` ((folder, articles), in row order) and
    write them with their corpus-wide IDF weights into `top/word_vectors`; returns the top
    manifest's entry."""
    started = time.perf_counter()
    out = top / WORDS_FOLDER
    out.mkdir(parents=True, exist_ok=True)
    lines = itertools.chain.from_iterable(
        vecs.article_lines(folder, n, analyzer) for folder, n in shards
    )
    words, wordvec, settings = vecs.train_lines(
        lines, out / ".vector-training.txt", settings, progress
    )
    row_of = {w: i for i, w in enumerate(words)}
    rows = np.fromiter((row_of.get(t, -1) for t in stats.terms), np.int32, len(stats.terms))
    weight = vecs.idf_weights(stats.body.df, rows, len(words), stats.body.n_docs)
    store.save_array(out, vecs.WORDVEC, wordvec)
    store.save_array(out, vecs.WORDVEC_WEIGHT, weight)
    columns.write_strings(out, vecs.WORDVEC_TERMS, words)
    return {
        "folder": WORDS_FOLDER,
        "words": len(words),
        "settings": settings.to_dict(),
        "seconds": round(time.perf_counter() - started, 3),
    }


def _shared(words_dir: Path, n_words: int, dim: int) -> tuple[list[str], np.ndarray, np.ndarray]:
    wordvec = np.array(vecs.open_matrix(words_dir, vecs.WORDVEC, "float32", n_words, dim))
    weight = np.array(store.open_array(words_dir, vecs.WORDVEC_WEIGHT, "float32", n_words))
    words = list(columns.StringColumn(words_dir, vecs.WORDVEC_TERMS, n_words))
    return words, wordvec, weight


def write_shard_vectors(shard_dir: str, words_dir: str, entry: dict[str, Any]) -> int:
    """Pass 3: copy the shared word vectors into one shard folder and write its articles'
    vectors (its manifest gains the `vectors` entry an unsharded index has). Returns the
    shard's articles without a vector."""
    started = time.perf_counter()
    folder = Path(shard_dir)
    settings = vecs.VectorSettings.from_dict(entry["settings"])
    try:
        words, wordvec, weight = _shared(Path(words_dir), int(entry["words"]), settings.dim)
    except (OSError, ValueError) as exc:
        msg = f"{words_dir}: the shared word vectors are unreadable ({exc})"
        raise IndexFormatError(msg) from exc
    manifest = store.read_manifest(folder)
    store.save_array(folder, vecs.WORDVEC, wordvec)
    store.save_array(folder, vecs.WORDVEC_WEIGHT, weight)
    columns.write_strings(folder, vecs.WORDVEC_TERMS, words)
    vec_entry = vecs.write_article_vectors(folder, manifest, words, wordvec, weight, settings)
    vec_entry["trained"] = True  # over the whole corpus, by the driver
    vec_entry["seconds"] = round(time.perf_counter() - started, 3)
    manifest["vectors"] = vec_entry
    manifest["build"]["seconds"] = round(manifest["build"]["seconds"] + vec_entry["seconds"], 3)
    manifest["build"]["bytes_on_disk"] = store.folder_size(folder)
    store.write_json(folder / store.MANIFEST, manifest)
    return int(vec_entry["articles_without_vector"])


def copy_generations(
    source: Path, folder: Path, only: Sequence[str] | None = None, progress: bool = False
) -> list[str]:
    """Write vector generations of the unsharded index in `source` (those named, else all)
    into every shard of the sharded index in `folder`: a model trained on `source` names
    its refined vectors' generation (retriever/vecgen.py), which the sharded view opens in
    each shard. Each shard gets the same words, word vectors and weights (so the same
    generation name) and its own articles' vectors, made from its stored term counts
    (`vecgen.carry_over`, no training). Returns the generations written."""
    source, folder = Path(source), Path(folder)
    if store.is_sharded(source):
        raise IndexFormatError(
            f"{source} is a sharded index; copy from the unsharded index the model was trained on"
        )
    have = vecgen.names(source)
    names = list(have if only is None else only)
    for name in names:
        if name not in have:
            listed = ", ".join(have) or "none"
            raise IndexFormatError(
                f"{source}: has no vector generation {name!r} (it has: {listed}); give the "
                "index folder the model was trained on"
            )
    analyzer = store.read_manifest(source).get("analyzer")
    shards = [folder / str(e["folder"]) for e in sharded.read_manifest(folder)["shards"]]
    for shard in shards:
        if store.read_manifest(shard).get("analyzer") != analyzer:
            raise IndexFormatError(
                f"{shard}: analyses text otherwise than {source} (manifest field 'analyzer'); "
                "its vectors would not match this index's terms"
            )
    for shard in tqdm(shards, desc="shards", unit=" shard", disable=not progress):
        vecgen.carry_over(source, shard, only=names)
    return names
