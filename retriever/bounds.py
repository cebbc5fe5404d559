"""Upper bounds of the stored BM25 weights, which let the query kernel skip postings.

For each field an index folder keeps `{field}_term_max` (each term's largest posting
weight) and `{field}_block_max` (the largest weight of each run of 64 postings in the
term-major arrays; a run may straddle two terms, which only loosens the bound). The
compiled kernel's windowed top-k (retriever/_daat.h) uses them to skip articles that cannot
reach the k best. Folders written before these files existed still open: their queries
are scored exhaustively (the same results), until the index is rebuilt or updated.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import store

BLOCK = 64  # postings per block maximum; the kernel's PRUNE_BLOCK


@dataclass(frozen=True)
class Bounds:
    """One field's weight maxima: per term (n_terms) and per block of BLOCK postings."""

    term_max: np.ndarray
    block_max: np.ndarray


def compute(indptr: np.ndarray, weight: np.ndarray) -> Bounds:
    """The maxima of one field's term-major weights (0 for a term without postings)."""
    n_terms = int(indptr.size - 1)
    term_max = np.zeros(n_terms, dtype=weight.dtype)
    lengths = np.diff(indptr)
    nonempty = np.flatnonzero(lengths > 0)
    if nonempty.size:
        term_max[nonempty] = np.maximum.reduceat(weight, indptr[nonempty])
    n_blocks = -(-int(weight.size) // BLOCK)
    block_max = (
        np.maximum.reduceat(weight, np.arange(0, weight.size, BLOCK))
        if n_blocks
        else np.zeros(0, dtype=weight.dtype)
    )
    return Bounds(term_max, block_max.astype(weight.dtype, copy=False))


def save(folder: Path, prefix: str, indptr: np.ndarray, weight: np.ndarray) -> None:
    """Write one field's maxima beside its postings (in the folder being built)."""
    b = compute(indptr, weight)
    store.save_array(folder, f"{prefix}_term_max", b.term_max)
    store.save_array(folder, f"{prefix}_block_max", b.block_max)


def open_bounds(
    folder: Path, prefix: str, n_terms: int, n_postings: int, dtype: str
) -> Bounds | None:
    """Memory-map one field's maxima, or None for a folder written without them."""
    if not (folder / f"{prefix}_term_max.npy").exists():
        return None
    return Bounds(
        np.asarray(store.open_array(folder, f"{prefix}_term_max", dtype, n_terms)),
        np.asarray(store.open_array(folder, f"{prefix}_block_max", dtype, -(-n_postings // BLOCK))),
    )
