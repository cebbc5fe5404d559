"""The compiled pass over the built-in features of FUSED_NAMES, the way serving computes them.

The functions in builtin.py define the features. Computing them one by one costs a numpy call
or a Python loop each, far more than the arithmetic at 20 candidates, so reranker/_fused.c
(built at install) fills the whole matrix in one call from the candidates' scores, the
per-row tables of rowtables.py and the clue's term and name ids. `builtin.fused_builtins`
uses it where it is built and calls the definitions themselves where it is not (a machine
without a C compiler): there is no third copy. tests/reranker/test_fused.py checks the
compiled pass against the definitions, column by column.
"""

from __future__ import annotations

import importlib
from typing import Any

import numpy as np

from .clueterms import body_terms
from .registry import CandidateSet
from .rowtables import ROW_VALUES, SPANS, name_table, values_table

# The columns of the fused matrix, in order: the one list of them. The compiled module
# exports the order it was built with, checked against this one at import below.
FUSED_NAMES = (
    "bm25_score", "bm25_rank", "inverse_rank", "gap_to_next", "gap_to_best_rival",
    "score_ratio_to_top", "score_zscore", "score_softmax",
    "clue_words", "log_clue_words", "score_x_clue_words", "softmax_x_log_words",
    "inlinks", "log_inlinks", "log_inlinks_vs_best", "log_popularity", "popularity_missing",
    "has_qualifier", "qualifier_in_clue", "qualifier_overlap",
    "title_overlap", "alias_overlap",
    "matched_terms", "matched_fraction", "matched_rarity", "log_doc_length",
    "qualifier_frequency",
)  # fmt: skip


def check_layout(module: Any) -> None:
    """Raise ImportError unless `module` (the built _fused) lays out its output and the row
    tables as FUSED_NAMES, ROW_VALUES and SPANS say (a build from another version of them)."""
    for what, ours in (("COLUMNS", FUSED_NAMES), ("ROW_VALUES", ROW_VALUES), ("SPANS", SPANS)):
        built = tuple(getattr(module, what, ()))
        if built != ours:
            at = next(i for i in range(len(built) + 1) if built[i : i + 1] != ours[i : i + 1])
            raise ImportError(
                f"reranker/features/_fused.c was built with other {what} than the Python code "
                f"(first difference at position {at}: built {built[at : at + 1]}, Python "
                f"{ours[at : at + 1]}); edit the X-macro lists in _fused.c to match, then "
                "rebuild with: python3 -m pip install -e ."
            )


_fused: Any
try:
    _fused = importlib.import_module("reranker.features._fused")  # built by setup.py from _fused.c
except ImportError:  # pragma: no cover - a machine without a C compiler at install time
    _fused = None
if _fused is not None:
    check_layout(_fused)


def compiled(cs: CandidateSet) -> np.ndarray | None:
    """Every feature of FUSED_NAMES by the compiled pass, in that order (float64, shape
    (n, len(FUSED_NAMES)), n >= 1), or None where the compiled module is not built."""
    if _fused is None:
        return None
    index = cs.index
    out = np.empty((len(cs), len(FUSED_NAMES)))
    terms = body_terms(index, cs.tokens)
    fwd_indptr, fwd_terms = index.article_term_lists()
    names, values = name_table(index), values_table(index)

    def fill_out() -> bool:
        clue = names.clue_ids(cs.tokens)
        return bool(
            _fused.candidates(
                out, cs.scores, cs.ranks, cs.rows, len(cs.words), values, names.spans,
                names.arena, clue, fwd_indptr, fwd_terms, terms,
            )
        )  # fmt: skip

    with names.lock:  # the arena may grow while rows are added (see rowtables.NameTable)
        if not fill_out():  # some rows are candidates for the first time
            names.fill(index, cs.rows)
            if not fill_out():
                raise RuntimeError("the feature tables were not filled; this is a bug")
    return out
