"""The same index under other BM25 parameters, re-weighted in memory without re-reading text.

An index folder keeps each field's term counts (`body_tf`, `title_tf`) beside the postings,
so the weights for another k1, b or IDF variant follow from arrays already on disk: no
corpus is read or tokenised again. `Reweighter` loads the counts once and hands out an
`Index` per parameter set whose weights equal, bit for bit, those a fresh build with those
parameters would store (the same `FieldCounts` code computes both).
"""

from __future__ import annotations

import copy
import threading
from typing import Any

import numpy as np
import scipy.sparse as sp

from . import bounds, store
from .bm25 import BM25Params
from .fieldpostings import FieldPostings
from .folderwriter import index_version
from .index import Index
from .postings import FieldCounts, weight_dtype


class _Reweighted(FieldPostings):
    """One field's postings arrays with weights computed in memory."""

    def __init__(self, base: FieldPostings, weight: np.ndarray) -> None:
        self.indptr, self.docs, self.weight = base.indptr, base.docs, weight
        self.bounds = bounds.compute(self.indptr, weight)  # the stored ones are for old weights


class Reweighter:
    """Hands out an index's re-weighted copies; the term counts are loaded once."""

    def __init__(self, index: Index) -> None:
        self.index = index
        self._tf: dict[str, sp.csc_matrix] = {}
        for prefix, fld in (("body", index.body), ("title", index.title_field)):
            tf = store.open_array(index.path, f"{prefix}_tf", "int32", int(fld.docs.size))
            self._tf[prefix] = sp.csc_matrix(
                (tf, fld.docs, fld.indptr), shape=(index.n_docs, index.n_terms)
            )
        self._counts: dict[tuple[str, float], tuple[FieldCounts, FieldCounts]] = {}

    def _fields(self, params: BM25Params) -> tuple[FieldCounts, FieldCounts]:
        """Both fields' counts and IDF for the IDF variant of `params` (cached)."""
        key = (params.idf, params.epsilon if params.idf == "okapi" else 0.0)
        if key not in self._counts:
            self._counts[key] = (
                FieldCounts(self._tf["body"], params),
                FieldCounts(self._tf["title"], params),
            )
        return self._counts[key]

    def with_params(self, params: BM25Params) -> Index:
        """The index as a build with `params` would give it (read-only, in memory)."""
        base = self.index
        body, title = self._fields(params)
        dtype = weight_dtype(body.idf, title.idf)
        out = copy.copy(base)  # shares the memory maps, the columns and the article store
        out.body = _Reweighted(base.body, body.weights(params, dtype))
        out.title_field = _Reweighted(base.title_field, title.weights(params, dtype))
        out.params = params
        out.title_weight = params.title_weight
        manifest: dict[str, Any] = dict(base.manifest)
        manifest["bm25"] = params.to_dict()
        manifest["weights"] = np.dtype(dtype).name
        manifest["index_version"] = index_version(
            str(manifest["corpus_checksum"]), params, base.analyzer.config
        )
        out.manifest = manifest
        out._local = threading.local()  # score buffers of the new weight type
        return out


def reweighted(index: Index, params: BM25Params) -> Index:
    """`index` under other BM25 parameters, computed in memory (see `Reweighter`)."""
    return Reweighter(index).with_params(params)
