"""The word and article vectors stored in an index folder (file names, and `DenseVectors`,
which memory-maps them read-only and checks their types and shapes)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from . import columns, store
from .errors import IndexFormatError
from .npymap import map_npy
from .vecsettings import VectorSettings

WORDVEC, WORDVEC_WEIGHT, WORDVEC_TERMS = "wordvec", "wordvec_weight", "wordvec_terms"
TERMVEC_ROW, DOCVEC = "termvec_row", "docvec"


def open_matrix(folder: Path, name: str, dtype: str, rows: int, dim: int) -> np.ndarray:
    """Memory-map a 2-d `name.npy` read-only, checking its type and shape."""
    path = folder / f"{name}.npy"
    try:
        arr = map_npy(path)
    except FileNotFoundError as exc:
        raise IndexFormatError(f"{folder}: {path.name} is missing; rebuild the index") from exc
    except (ValueError, OSError, EOFError) as exc:
        raise IndexFormatError(f"{folder}: {path.name} is corrupt ({exc}); rebuild") from exc
    if arr.dtype != np.dtype(dtype) or arr.shape != (rows, dim):
        raise IndexFormatError(
            f"{folder}: {path.name} holds {arr.dtype} of shape {arr.shape}, expected {dtype} "
            f"of shape ({rows}, {dim}); the index is damaged, rebuild it"
        )
    return np.asarray(arr)


class DenseVectors:
    """The stored word and article vectors of an index, memory-mapped."""

    def __init__(self, folder: Path, entry: dict[str, Any], n_docs: int, n_terms: int) -> None:
        self.folder = folder
        self.settings = VectorSettings.from_dict(entry["settings"])
        dim, n_words = self.settings.dim, int(entry["words"])
        self.n_words = n_words
        self.wordvec = open_matrix(folder, WORDVEC, "float32", n_words, dim)
        self.weight = store.open_array(folder, WORDVEC_WEIGHT, "float32", n_words)
        self.termvec_row = store.open_array(folder, TERMVEC_ROW, "int32", n_terms)
        self.docvec = open_matrix(folder, DOCVEC, self.settings.dtype, n_docs, dim)
        self.ann_info: dict[str, Any] | None = entry.get("ann")

    @classmethod
    def open(cls, folder: Path, manifest: dict[str, Any]) -> DenseVectors | None:
        """The vectors of an index folder, or None for an index built without them."""
        entry = manifest.get("vectors")
        if not entry:
            return None
        counts = manifest["counts"]
        return cls(folder, entry, int(counts["articles"]), int(counts["terms"]))

    def words(self) -> list[str]:
        """The words that have vectors, in row order."""
        return list(columns.StringColumn(self.folder, WORDVEC_TERMS, self.n_words))

    def query_vector(self, term_ids: np.ndarray, qtf: np.ndarray) -> np.ndarray | None:
        """Unit-length vector of a clue given as known index term ids and their counts;
        None when none of its words has a vector."""
        rows = self.termvec_row[term_ids]
        has = rows >= 0
        if not has.any():
            return None
        r = rows[has]
        w = (qtf[has] * self.weight[r]).astype(np.float32)
        vec = w @ self.wordvec[r]
        norm = float(np.linalg.norm(vec))
        return (vec / norm).astype(np.float32) if norm > 0 else None
