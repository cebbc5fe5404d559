"""All the built-in features of FUSED_NAMES at once, the way serving and training compute them.

The functions in builtin.py define the features and are what the unit tests check by hand.
Computing them one by one costs a numpy call or a Python loop each, far more than the
arithmetic at 20 candidates, so `fused_builtins` computes them together:
- compiled (reranker/_fused.c, built at install): one call fills the whole matrix from the
  candidates' scores, the per-row tables of rowtables.py and the clue's term and name ids;
- its plain-Python twin, for a machine where the C module did not build: rows of one work
  array filled block by block, then put in FUSED_NAMES order.
Built-ins left out of FUSED_NAMES still work, one function call each.
tests/reranker/test_fused.py checks both against the functions, column by column.
"""

from __future__ import annotations

import importlib
import itertools
import math
from typing import Any

import numpy as np

from .clueterms import body_terms, matched
from .registry import CandidateSet
from .rowtables import ROW_VALUES, name_table, row_values, values_table

_fused: Any
try:
    _fused = importlib.import_module("reranker.features._fused")  # built by setup.py from _fused.c
except ImportError:  # pragma: no cover - a machine without a C compiler at install time
    _fused = None

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
if _fused is not None and tuple(_fused.COLUMNS) != FUSED_NAMES:
    raise ImportError(
        "reranker/_fused.c was built from another version of the features; "
        "rebuild it with: python3 -m pip install -e ."
    )


def fused_builtins(cs: CandidateSet) -> np.ndarray:
    """Every feature of FUSED_NAMES, in that order. float64, shape (n, len(FUSED_NAMES))."""
    if len(cs) == 0:
        return np.empty((0, len(FUSED_NAMES)))
    if _fused is not None:
        return _compiled(cs)
    return _python(cs)


def _compiled(cs: CandidateSet) -> np.ndarray:
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


# -- the plain-Python twin ----------------------------------------------------------------
# Rows of the work array, grouped so that each block is written by one operation.
_WORK = (
    "score_softmax", "bm25_score", "(score minus mean)", "gap_to_best_rival",
    "score_ratio_to_top", "score_zscore", "softmax_x_log_words", "score_x_clue_words",
    "bm25_rank", "inverse_rank", "gap_to_next", "clue_words", "log_clue_words",
    # per row, from the row table (rowtables.ROW_VALUES order)
    "inlinks", "log_inlinks", "log_popularity", "popularity_missing", "log_doc_length",
    "has_qualifier", "qualifier_frequency", "(filled)",
    "log_inlinks_vs_best",
    # per row and clue: 0 unless a name token of the row is in the clue
    "qualifier_in_clue", "qualifier_overlap", "title_overlap", "alias_overlap",
    "matched_terms", "matched_fraction", "matched_rarity",
)  # fmt: skip
_ORDER = np.array([_WORK.index(name) for name in FUSED_NAMES])
if _WORK[13:21] != ROW_VALUES:
    raise ValueError("work rows 13-20 must be rowtables.ROW_VALUES")


def within_clue(s: list[float], ranks: list[float], words: int, f: np.ndarray) -> None:
    """Rows 0-12 of the work array: the score features that compare a candidate with its
    rivals, and the clue length. Sums run left to right, as in the compiled code."""
    n = len(s)
    best = max(s)
    lead = s.index(best)  # the first best, as a stable sort would put it
    mean = _sum(s) / n
    exps = [math.exp(x - best) for x in s]
    total = _sum(exps)
    soft = [e / total for e in exps]
    centred = [x - mean for x in s]
    sd = math.sqrt(_sum([c * c for c in centred]) / n)
    rival = [x - best for x in s]  # everyone's best rival is the leader, except the leader's
    if n > 1:
        rival[lead] = best - max(s[:lead] + s[lead + 1 :])
    log_words = math.log1p(words)
    f[0:13] = (
        soft,
        s,
        centred,
        rival,
        [x / best for x in s] if best > 0 else [0.0] * n,
        [c / sd for c in centred] if sd > 0 else [0.0] * n,
        [p * log_words for p in soft],
        [x * words for x in s],
        ranks,
        [1.0 / r for r in ranks],
        [a - b for a, b in itertools.pairwise(s)] + [0.0],
        [float(words)] * n,
        [log_words] * n,
    )


def _sum(values: list[float]) -> float:
    # Not sum(): from Python 3.12 it compensates rounding, and the compiled code does not.
    total = 0.0
    for v in values:
        total += v
    return total


def _python(cs: CandidateSet) -> np.ndarray:
    f = np.empty((len(_WORK), len(cs)))  # one contiguous row per feature
    within_clue(cs.scores.tolist(), cs.ranks.tolist(), len(cs.words), f)
    # popularity, document length, qualifier: one gather from the row table
    f[13:21] = row_values(cs.index, cs.rows).T
    np.subtract(f[14], np.maximum.reduce(f[14]), out=f[21])
    # qualifier and title words in the clue: a set test per candidate (20 or so, not the
    # corpus), and the fractions only for the few that share a word with the clue
    f[22:26] = 0.0
    clue = cs.token_set
    disjoint, common = clue.isdisjoint, clue.intersection
    for j, e in enumerate(cs.names):
        if disjoint(e.tokens):
            continue
        qual, base, alias = e.qualifier_tokens, e.base, e.aliases
        in_clue = len(common(qual)) if qual else 0
        f[22:26, j] = (
            1.0 if in_clue else 0.0,
            in_clue / len(qual) if qual else 0.0,
            len(common(base)) / len(base) if base else 0.0,
            len(common(alias)) / len(alias) if alias else 0.0,
        )
    # term overlap
    count, rarity, known = matched(cs)
    f[26] = count
    np.divide(count, known if known else 1, out=f[27])  # count is all 0 when nothing is known
    f[28] = rarity
    return f.T.take(_ORDER, axis=1)
