"""One field's term-major postings in an index folder (CSR arrays over the shared
vocabulary: where each term's postings start, their rows and BM25 weights, and the
weight bounds used for pruning), memory-mapped and checked against each other."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import bounds, store
from .errors import IndexFormatError


class FieldPostings:
    """Term-major postings of one field: CSR arrays over the shared vocabulary."""

    def __init__(
        self, folder: Path, prefix: str, n_terms: int, n_postings: int, dtype: str
    ) -> None:
        # Plain ndarray views of the memory maps: slicing a np.memmap costs far more.
        self.indptr = np.asarray(store.open_array(folder, f"{prefix}_indptr", "int64", n_terms + 1))
        self.docs = np.asarray(store.open_array(folder, f"{prefix}_docs", "int32", n_postings))
        self.weight = np.asarray(store.open_array(folder, f"{prefix}_weight", dtype, n_postings))
        if int(self.indptr[-1]) != n_postings or (n_terms and int(self.indptr[0]) != 0):
            raise IndexFormatError(
                f"{folder}: {prefix}_indptr does not match the postings; rebuild the index"
            )
        # None for a folder written before the bounds existed: scored exhaustively.
        self.bounds = bounds.open_bounds(folder, prefix, n_terms, n_postings, dtype)
