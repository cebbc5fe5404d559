"""Word vectors learned from the index's own analyzed text, and one vector per article.

At build time gensim's word2vec (skip-gram) is trained on every article's analyzed tokens
(title then text), seeded, with more passes over small corpora (`epochs_for_tokens`); on
one thread (`threads=1`) the same corpus and settings give the same vectors, on more (the
default uses up to 4 cores) they differ a little from build to build. Each word also gets
a fixed weight, its IDF over the article texts at training time. An article's vector is
the weighted sum of its words' vectors (each token counts once per occurrence), scaled to
unit length; a clue's vector is made the same way, so a cosine is one dot product.
Articles added later get vectors from the stored words and weights without training
again, and an article's vector depends only on its own text.

Files in the index folder (all npy or plain text, never pickle): wordvec.npy (words x dim,
float32), wordvec_weight.npy (float32), wordvec_terms.bin/_offsets.npy (the words),
termvec_row.npy (index term id -> word row or -1), docvec.npy (articles x dim, float32 or
float16). gensim's own model file is not kept.
"""

from __future__ import annotations

import time
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp

from . import columns, store
from .analyzer import Analyzer
from .errors import IndexFormatError
from .storedvectors import (
    DOCVEC,
    TERMVEC_ROW,
    WORDVEC,
    WORDVEC_TERMS,
    WORDVEC_WEIGHT,
    DenseVectors,
    open_matrix,
)
from .vecsettings import (
    MAX_EPOCHS,
    MIN_EPOCHS,
    TOKEN_PASSES,
    VectorSettings,
    epochs_for_tokens,
    resolve_settings,
)
from .wordtraining import Trained, article_lines, train, train_lines

# The settings, the stored files and the training live in their own modules; this one,
# which writes the vectors into a folder, names them all, as callers have always used them.
__all__ = [
    "DOCVEC",
    "MAX_EPOCHS",
    "MIN_EPOCHS",
    "TERMVEC_ROW",
    "TOKEN_PASSES",
    "WORDVEC",
    "WORDVEC_TERMS",
    "WORDVEC_WEIGHT",
    "DenseVectors",
    "Trained",
    "VectorSettings",
    "add_to_folder",
    "article_lines",
    "article_vectors",
    "body_counts",
    "columns",
    "epochs_for_tokens",
    "folder_idf_weights",
    "idf_weights",
    "open_matrix",
    "resolve_settings",
    "store",
    "term_rows",
    "train",
    "train_lines",
    "write_article_vectors",
]

_DOC_BLOCK = 32_768  # article rows per block when computing article vectors


def body_counts(folder: Path, manifest: dict[str, Any]) -> sp.csr_matrix:
    """Article-major body term counts (articles x index terms) from a folder's postings."""
    counts = manifest["counts"]
    n_docs, n_terms, nnz = (
        int(counts["articles"]),
        int(counts["terms"]),
        int(counts["body_postings"]),
    )
    indptr = store.open_array(folder, "body_indptr", "int64", n_terms + 1)
    docs = store.open_array(folder, "body_docs", "int32", nnz)
    tf = store.open_array(folder, "body_tf", "int32", nnz)
    return sp.csc_matrix((tf, docs, indptr), shape=(n_docs, n_terms)).tocsr()


def term_rows(folder: Path, n_terms: int, words: list[str]) -> np.ndarray:
    """For each index term id, the row of its word vector or -1. int32."""
    row_of = {w: i for i, w in enumerate(words)}
    terms = columns.StringColumn(folder, "terms", n_terms)
    return np.fromiter((row_of.get(t, -1) for t in terms), dtype=np.int32, count=n_terms)


def article_vectors(
    counts: sp.csr_matrix,
    termvec_row: np.ndarray,
    wordvec: np.ndarray,
    weight: np.ndarray,
    out: np.ndarray,
) -> None:
    """Fill `out` (articles x dim) with unit-length weighted sums of word vectors; rows with
    no known word stay zero. Block by block, so memory stays bounded."""
    has = np.flatnonzero(termvec_row >= 0)
    # Index terms with a vector -> their weighted word vector (float32).
    term_vec = wordvec[termvec_row[has]] * weight[termvec_row[has], None]
    for s in range(0, counts.shape[0], _DOC_BLOCK):
        block = counts[s : s + _DOC_BLOCK][:, has].astype(np.float32)
        vec = np.asarray(block @ term_vec, dtype=np.float32)
        norm = np.linalg.norm(vec, axis=1, keepdims=True)
        np.divide(vec, norm, out=vec, where=norm > 0)
        out[s : s + vec.shape[0]] = vec


def write_article_vectors(
    folder: Path,
    manifest: dict[str, Any],
    words: list[str],
    wordvec: np.ndarray,
    weight: np.ndarray,
    settings: VectorSettings,
) -> dict[str, Any]:
    """Write termvec_row and docvec (and the ANN index when big enough) for the articles of
    `folder`, whose other arrays are already written. Returns the manifest's vectors entry."""
    n_docs, n_terms = int(manifest["counts"]["articles"]), int(manifest["counts"]["terms"])
    rows = term_rows(folder, n_terms, words)
    store.save_array(folder, TERMVEC_ROW, rows)
    path = folder / f"{DOCVEC}.npy"
    out = np.lib.format.open_memmap(
        path, mode="w+", dtype=settings.dtype, shape=(n_docs, settings.dim)
    )
    article_vectors(body_counts(folder, manifest), rows, wordvec, weight, out)
    out.flush()
    empty = int(np.count_nonzero(~np.any(out != 0, axis=1)))
    del out
    entry: dict[str, Any] = {
        "settings": settings.to_dict(),
        "words": len(words),
        "articles_without_vector": empty,
        "ann": None,
    }
    if n_docs >= settings.ann_min_articles and words:
        from . import ann

        entry["ann"] = ann.build(
            folder, open_matrix(folder, DOCVEC, settings.dtype, n_docs, settings.dim), settings
        )
    return entry


def add_to_folder(
    folder: Path,
    analyzer: Analyzer,
    settings: VectorSettings,
    *,
    progress: bool = False,
    from_folder: Path | None = None,
) -> None:
    """Add vectors to the finished index in `folder` (its manifest is rewritten).

    Trains new word vectors, or with `from_folder` reuses that index's words and weights.
    """
    started = time.perf_counter()
    manifest = store.read_manifest(folder)
    n_docs = int(manifest["counts"]["articles"])
    if from_folder is None:
        words, wordvec, settings = train(folder, n_docs, analyzer, settings, progress)
        weight = folder_idf_weights(folder, manifest, words)
        trained = True
    else:
        old = DenseVectors.open(from_folder, store.read_manifest(from_folder))
        if old is None:
            raise IndexFormatError(f"{from_folder}: the index has no word vectors to reuse")
        words, wordvec, weight = old.words(), np.asarray(old.wordvec), np.asarray(old.weight)
        if settings.epochs == 0:  # the vectors are those trained with the old epochs
            settings = replace(settings, epochs=old.settings.epochs)
        trained = False
    store.save_array(folder, WORDVEC, wordvec)
    store.save_array(folder, WORDVEC_WEIGHT, weight.astype(np.float32))
    columns.write_strings(folder, WORDVEC_TERMS, words)
    entry = write_article_vectors(folder, manifest, words, wordvec, weight, settings)
    entry["trained"] = trained
    entry["seconds"] = round(time.perf_counter() - started, 3)
    manifest["vectors"] = entry
    manifest["build"]["seconds"] = round(manifest["build"]["seconds"] + entry["seconds"], 3)
    manifest["build"]["bytes_on_disk"] = store.folder_size(folder)
    store.write_json(folder / store.MANIFEST, manifest)


def folder_idf_weights(folder: Path, manifest: dict[str, Any], words: list[str]) -> np.ndarray:
    """Each word's weight: its always-positive IDF log(1 + (N - df + 0.5) / (df + 0.5)) over
    the article texts (Lucene's form, so no word counts against an article). float32."""
    counts = manifest["counts"]
    n_docs, n_terms = int(counts["articles"]), int(counts["terms"])
    indptr = store.open_array(folder, "body_indptr", "int64", n_terms + 1)
    return idf_weights(np.diff(indptr), term_rows(folder, n_terms, words), len(words), n_docs)


def idf_weights(df_term: np.ndarray, rows: np.ndarray, n_words: int, n_docs: int) -> np.ndarray:
    """Each word's weight from its index term's document frequency `df_term` (rows: index
    term id -> word row or -1); see `folder_idf_weights`. float32."""
    df = np.zeros(n_words)
    has = rows >= 0
    df[rows[has]] = np.asarray(df_term, dtype=np.float64)[has]
    return np.log1p((n_docs - df + 0.5) / (df + 0.5)).astype(np.float32)
