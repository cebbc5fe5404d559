"""Term-major postings of the counted fields and their BM25 weights, as the index stores them."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp

from . import bm25, store
from .counting import TermCounter

# Postings per slice when computing weights: bounds the float64 temporaries (~5 x 8 bytes
# per posting) whatever the corpus size.
_WEIGHT_SLICE = 1 << 21


@dataclass(frozen=True)
class FieldStats:
    """One field's statistics over a whole corpus, for a part of it written on its own.

    df: articles holding each term of the shared vocabulary (int64); n_docs: articles in
    the corpus; total_len: the field's tokens over the corpus (avgdl = total_len / n_docs).
    """

    df: np.ndarray
    n_docs: int
    total_len: int


@dataclass(frozen=True)
class CorpusStats:
    """The statistics a part of a corpus needs to get the weights a whole build gives it:
    the corpus's sorted vocabulary and each field's FieldStats over that vocabulary."""

    terms: Sequence[str]
    body: FieldStats
    title: FieldStats


class FieldCounts:
    """Term-major counts of one field and its per-term IDF.

    With `stats`, the counts are some rows of a bigger corpus (a shard): IDF and average
    length come from the corpus's figures, so every weight equals the whole build's.
    """

    def __init__(
        self, tf: sp.csc_matrix, params: bm25.BM25Params, stats: FieldStats | None = None
    ) -> None:
        self.tf = tf
        n_docs = tf.shape[0]
        if not tf.has_sorted_indices:
            tf.sort_indices()
        self.doc_len = np.bincount(tf.indices, weights=tf.data, minlength=n_docs).astype(np.int64)
        self.df = np.diff(tf.indptr)  # postings per term here (weights() walks them)
        if stats is None:
            total, n_all, df_all = int(self.doc_len.sum()), n_docs, self.df
        else:
            if stats.df.size != self.df.size:
                raise ValueError(
                    f"the corpus statistics cover {stats.df.size} terms, these counts "
                    f"{self.df.size}"
                )
            total, n_all, df_all = int(stats.total_len), int(stats.n_docs), stats.df
        self.avgdl = float(total) / n_all if n_all else 0.0
        # The IDF (and the okapi floor's mean) is over the terms this field contains, as in
        # rank_bm25; the shared vocabulary also holds terms seen only in the other field.
        present = df_all > 0
        self.idf = np.zeros(df_all.size, dtype=np.float64)
        self.idf[present] = bm25.idf(df_all[present], n_all, params)

    def weights(self, params: bm25.BM25Params, dtype: type[np.floating[Any]]) -> np.ndarray:
        """BM25 weight of every posting, in term-major order, computed slice by slice."""
        tf = self.tf
        out = np.empty(tf.nnz, dtype=dtype)
        posting_term = np.repeat(np.arange(self.df.size, dtype=np.int32), self.df)
        k1, b, avgdl = params.k1, params.b, self.avgdl
        # bm25.term_weights's arithmetic, operation for operation (so every weight is the
        # same to the bit), with the length part computed once per article instead of once
        # per posting and the temporaries reused.
        if avgdl > 0:
            doc_norm = k1 * (1.0 - b + b * self.doc_len.astype(np.float64) / avgdl)
        else:
            doc_norm = np.full(self.doc_len.size, k1 * (1.0 - b))
        for s in range(0, tf.nnz, _WEIGHT_SLICE):
            e = min(tf.nnz, s + _WEIGHT_SLICE)
            freq = tf.data[s:e].astype(np.float64)
            norm = doc_norm[tf.indices[s:e]]
            norm += freq  # tf + norm
            freq *= k1 + 1.0  # tf * (k1 + 1)
            w = self.idf[posting_term[s:e]]
            w *= freq
            with np.errstate(divide="ignore", invalid="ignore"):
                w /= norm
            out[s:e] = np.nan_to_num(w, copy=False, nan=0.0)
        return out

    def save(self, folder: Path, prefix: str, weights: np.ndarray) -> None:
        """Write this field's postings arrays."""
        store.save_array(folder, f"{prefix}_indptr", self.tf.indptr.astype(np.int64))
        store.save_array(folder, f"{prefix}_docs", self.tf.indices.astype(np.int32, copy=False))
        store.save_array(folder, f"{prefix}_tf", self.tf.data.astype(np.int32, copy=False))
        store.save_array(folder, f"{prefix}_weight", weights)


def weight_dtype(*idfs: np.ndarray) -> type[np.floating[Any]]:
    """float32 when no IDF is negative (so no weight is), else float64.

    Positive weights summed in float32 stay within ~1e-6 relative of float64 and halve
    memory and scan time. Negative weights (the okapi floor on tiny corpora whose mean IDF is
    negative) can cancel positive ones, and float32 then loses the 1e-5 relative agreement
    with rank_bm25, so those indexes keep float64.
    """
    if any(i.size and float(i.min()) < 0 for i in idfs):
        return np.float64
    return np.float32


def sorted_terms(terms: Iterable[str]) -> list[str]:
    """Distinct terms in the vocabulary's order (code points: the same corpus always gives
    the same index, and a sharded build's driver sorts its union the same way)."""
    # Python compares str by code point; sorting the list itself is faster than numpy's
    # fixed-width copy of every name, whose width is the longest name's.
    return sorted(str(t) for t in terms)


def term_major(
    counter: TermCounter, order: np.ndarray | None, vocab: Sequence[str] | None = None
) -> tuple[list[str], list[sp.csc_matrix], tuple[np.ndarray, np.ndarray]]:
    """Sorted vocabulary of the used terms, each field's (articles x terms) CSC counts, and
    the body's article-major term ids (indptr, sorted term ids per article).

    `vocab`: a given sorted vocabulary (a whole corpus's, for one shard of it) to use
    instead; it must hold every term these articles use.
    """
    n_terms = len(counter.terms)
    used = np.zeros(n_terms, dtype=bool)
    rows = []
    for name, field_order in (("body", order), ("title", None)):
        m = counter.matrix(name, field_order)
        counter.chunks[name] = []  # the stacked copy replaces the chunks
        used |= np.bincount(m.indices, minlength=n_terms) > 0
        rows.append(m)
    used_ids = np.flatnonzero(used)
    new_id = np.full(n_terms, -1, dtype=np.int32)
    if vocab is None:
        # Distinct names, so the order is that of sorted_terms: code points.
        ranked = sorted(used_ids.tolist(), key=counter.terms.__getitem__)
        new_id[ranked] = np.arange(len(ranked), dtype=np.int32)
        out_terms = [counter.terms[i] for i in ranked]
    else:
        position = {t: i for i, t in enumerate(vocab)}
        for i in used_ids.tolist():
            gid = position.get(counter.terms[i])
            if gid is None:
                raise ValueError(f"term {counter.terms[i]!r} is not in the given vocabulary")
            new_id[i] = gid
        out_terms = list(vocab)
    width = len(out_terms)
    mats = []
    forward: tuple[np.ndarray, np.ndarray] | None = None
    while rows:
        m = rows.pop(0)
        remapped = sp.csr_matrix((m.data, new_id[m.indices], m.indptr), shape=(m.shape[0], width))
        del m
        # tocsc is a counting sort that walks the rows in order, so each term's articles
        # come out ascending whatever the order within a row.
        csc = remapped.tocsc()
        del remapped
        if forward is None:  # the body comes first
            # The same counting sort back gives each article's terms ascending: cheaper than
            # sorting every row of the re-numbered matrix.
            back = csc.T.tocsc()
            forward = (back.indptr.astype(np.int64), back.indices.astype(np.int32))
            del back
        mats.append(csc)
    if forward is None:  # pragma: no cover - the body is always counted
        raise RuntimeError("no body field was counted")
    return out_terms, mats, forward
