"""Approximate nearest-neighbour search over article vectors: an HNSW graph from faiss.

Used for big indexes only (VectorSettings.ann_min_articles); smaller ones are searched
exactly. The graph is saved with faiss's own binary writer (docvec.faiss, not pickle).
faiss was chosen over hnswlib after measuring both on 100k clustered 200-d unit vectors:
the same recall and speed at the same graph settings, and faiss ships wheels (hnswlib
compiles from source on install) and is actively released.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import numpy as np

from . import atomicfile
from .errors import IndexFormatError

ANN_FILE = "docvec.faiss"
_ADD_BLOCK = 65_536


def _faiss() -> Any:
    import faiss  # imported here: only big indexes need it

    return faiss


def build(folder: Path, docvec: np.ndarray, settings: Any, threads: int = 1) -> dict[str, Any]:
    """Build and save the HNSW graph of `docvec` (inner product); returns its manifest entry.

    One thread by default, so the same vectors give the same graph.
    """
    faiss = _faiss()
    started = time.perf_counter()
    faiss.omp_set_num_threads(max(1, threads))
    dim = docvec.shape[1]
    if settings.dtype == "float16":
        index = faiss.IndexHNSWSQ(
            dim, faiss.ScalarQuantizer.QT_fp16, settings.ann_m, faiss.METRIC_INNER_PRODUCT
        )
        index.train(np.zeros((1, dim), dtype=np.float32))  # fp16 needs no statistics
    else:
        index = faiss.IndexHNSWFlat(dim, settings.ann_m, faiss.METRIC_INNER_PRODUCT)
    index.hnsw.efConstruction = settings.ann_ef_construction
    for s in range(0, docvec.shape[0], _ADD_BLOCK):
        index.add(np.ascontiguousarray(docvec[s : s + _ADD_BLOCK], dtype=np.float32))
    with atomicfile.replacing(folder / ANN_FILE) as tmp:
        faiss.write_index(index, str(tmp))
    return {
        "library": "faiss",
        "kind": type(index).__name__,
        "m": settings.ann_m,
        "ef_construction": settings.ann_ef_construction,
        "seconds": round(time.perf_counter() - started, 3),
    }


class AnnIndex:
    """A loaded HNSW graph; `search` returns candidate rows for query vectors."""

    def __init__(self, folder: Path, n_docs: int, ef_search: int) -> None:
        faiss = _faiss()
        path = folder / ANN_FILE
        if not path.exists():
            raise IndexFormatError(f"{folder}: {ANN_FILE} is missing; rebuild the index")
        try:
            self._index = faiss.read_index(str(path))
        except RuntimeError as exc:
            raise IndexFormatError(f"{folder}: {ANN_FILE} is corrupt ({exc}); rebuild") from exc
        if self._index.ntotal != n_docs:
            raise IndexFormatError(
                f"{folder}: {ANN_FILE} holds {self._index.ntotal} vectors, expected {n_docs}; "
                "rebuild the index"
            )
        self.ef_search = ef_search

    def search(self, queries: np.ndarray, k: int) -> np.ndarray:
        """Rows of about the k nearest articles of each query (-1 pads). int64 (n, k)."""
        faiss = _faiss()
        params = faiss.SearchParametersHNSW()
        params.efSearch = max(self.ef_search, k)
        k = min(k, int(self._index.ntotal))
        _, rows = self._index.search(
            np.ascontiguousarray(queries, dtype=np.float32), k, params=params
        )
        return np.asarray(rows, dtype=np.int64)
