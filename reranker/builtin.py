"""The built-in candidate features, grouped for the ablation table."""

from __future__ import annotations

import importlib
import itertools
import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from retriever import Index

from .features import (
    CandidateSet,
    Feature,
    FeatureRegistry,
    FusedFeatures,
    index_cache,
    row_names,
)

_fused: Any
try:
    _fused = importlib.import_module("reranker._fused")  # built by setup.py from _fused.c
except ImportError:  # pragma: no cover - a machine without a C compiler at install time
    _fused = None

_FEATURES: list[Feature] = []


def feature(
    group: str,
) -> Callable[[Callable[[CandidateSet], np.ndarray]], Callable[[CandidateSet], np.ndarray]]:
    """Register the decorated function as a built-in feature of `group`."""

    def wrap(func: Callable[[CandidateSet], np.ndarray]) -> Callable[[CandidateSet], np.ndarray]:
        doc = (func.__doc__ or "").strip().splitlines()[0]
        _FEATURES.append(Feature(func.__name__, group, doc, func, trusted=True))
        return func

    return wrap


def _fraction(parts: list[frozenset[str]], clue: frozenset[str]) -> np.ndarray:
    return np.array([len(p & clue) / len(p) if p else 0.0 for p in parts])


# -- retrieval: the score and how it compares with the clue's other candidates ------------
@feature("retrieval")
def bm25_score(cs: CandidateSet) -> np.ndarray:
    """BM25 score of the candidate for the clue."""
    return cs.scores


@feature("retrieval")
def bm25_rank(cs: CandidateSet) -> np.ndarray:
    """1-based BM25 rank among the clue's candidates."""
    return cs.ranks.astype(np.float64)


@feature("retrieval")
def inverse_rank(cs: CandidateSet) -> np.ndarray:
    """1 / BM25 rank."""
    return 1.0 / cs.ranks


@feature("retrieval")
def gap_to_next(cs: CandidateSet) -> np.ndarray:
    """Score minus the next-ranked candidate's score (0 for the last)."""
    return np.append(cs.scores[:-1] - cs.scores[1:], 0.0)


@feature("retrieval")
def gap_to_best_rival(cs: CandidateSet) -> np.ndarray:
    """Score minus the best score among the other candidates (positive only for a clear leader)."""
    s = cs.scores
    if s.size < 2:
        return np.zeros_like(s)
    order = np.argsort(-s, kind="stable")
    best, second = s[order[0]], s[order[1]]
    rival = np.full_like(s, best)
    rival[order[0]] = second
    return s - rival


@feature("retrieval")
def score_ratio_to_top(cs: CandidateSet) -> np.ndarray:
    """Score divided by the top candidate's score."""
    top = cs.scores.max() if cs.scores.size else 0.0
    return cs.scores / top if top > 0 else np.zeros_like(cs.scores)


@feature("retrieval")
def score_zscore(cs: CandidateSet) -> np.ndarray:
    """Score standardized over the clue's candidates."""
    centred = cs.scores - cs.scores.mean()
    sd = float(np.sqrt(np.dot(centred, centred) / centred.size)) if centred.size else 0.0
    return centred / sd if sd > 0 else np.zeros_like(cs.scores)


@feature("retrieval")
def score_softmax(cs: CandidateSet) -> np.ndarray:
    """Softmax of the scores over the clue's candidates: a within-clue share of the evidence."""
    out = cs.memo.get("softmax")
    if out is None:
        z = np.exp(cs.scores - cs.scores.max()) if cs.scores.size else cs.scores
        out = cs.memo["softmax"] = z / z.sum() if z.size else z
    return out


# -- clue length: long clues make a high score more trustworthy ---------------------------
@feature("length")
def clue_words(cs: CandidateSet) -> np.ndarray:
    """Words of the clue seen so far."""
    return np.full(len(cs), float(len(cs.words)))


@feature("length")
def log_clue_words(cs: CandidateSet) -> np.ndarray:
    """log1p of the words seen so far."""
    return np.full(len(cs), np.log1p(len(cs.words)))


@feature("length")
def score_x_clue_words(cs: CandidateSet) -> np.ndarray:
    """BM25 score times the words seen so far."""
    return cs.scores * len(cs.words)


@feature("length")
def softmax_x_log_words(cs: CandidateSet) -> np.ndarray:
    """Softmax share times log1p(words seen): a leader in a long clue is worth more."""
    return score_softmax(cs) * np.log1p(len(cs.words))


# -- popularity: raw counts are long-tailed, the log is closer to normal ------------------
@feature("popularity")
def inlinks(cs: CandidateSet) -> np.ndarray:
    """In-link count (distinct articles linking here)."""
    return np.asarray(cs.index.inlinks[cs.rows], dtype=np.float64)


@feature("popularity")
def log_inlinks(cs: CandidateSet) -> np.ndarray:
    """log1p of the in-link count."""
    out = cs.memo.get("log_inlinks")
    if out is None:
        out = cs.memo["log_inlinks"] = np.log1p(inlinks(cs))
    return out


@feature("popularity")
def log_inlinks_vs_best(cs: CandidateSet) -> np.ndarray:
    """log1p(in-links) minus the highest among the clue's candidates."""
    v = log_inlinks(cs)
    return v - v.max() if v.size else v


@feature("popularity")
def log_popularity(cs: CandidateSet) -> np.ndarray:
    """log1p of the corpus's popularity field (0 when absent)."""
    p = np.asarray(cs.index.popularity[cs.rows], dtype=np.float64)
    return np.log1p(np.where(np.isnan(p), 0.0, p))


@feature("popularity")
def popularity_missing(cs: CandidateSet) -> np.ndarray:
    """1 when the article has no popularity value."""
    return np.isnan(np.asarray(cs.index.popularity[cs.rows], dtype=np.float64)).astype(np.float64)


# -- qualifier: does the clue say what kind of thing it wants? -----------------------------
@feature("qualifier")
def has_qualifier(cs: CandidateSet) -> np.ndarray:
    """1 when the title carries a parenthetical qualifier."""
    return np.array([1.0 if q else 0.0 for q in cs.qualifier_tokens])


@feature("qualifier")
def qualifier_in_clue(cs: CandidateSet) -> np.ndarray:
    """1 when any word of the qualifier appears in the clue."""
    clue = cs.token_set
    return np.array([1.0 if q & clue else 0.0 for q in cs.qualifier_tokens])


@feature("qualifier")
def qualifier_overlap(cs: CandidateSet) -> np.ndarray:
    """Fraction of the qualifier's words that appear in the clue."""
    return _fraction(cs.qualifier_tokens, cs.token_set)


# -- leakage: an answer is rarely named in its own clue ------------------------------------
@feature("leakage")
def title_overlap(cs: CandidateSet) -> np.ndarray:
    """Fraction of the title's base-name words that appear in the clue."""
    return _fraction(cs.base_tokens, cs.token_set)


@feature("leakage")
def alias_overlap(cs: CandidateSet) -> np.ndarray:
    """Fraction of the candidate's alias words that appear in the clue."""
    return _fraction(cs.alias_tokens, cs.token_set)


# -- term overlap: how much of the clue the article covers --------------------------------
def _matched(cs: CandidateSet) -> tuple[np.ndarray, np.ndarray, int]:
    """(distinct clue terms in each candidate, their summed log(N/df), known clue terms)."""
    cached = cs.memo.get("matched")
    if cached is None:
        cached = cs.memo["matched"] = _match_terms(cs)
    return cached


def _match_terms(cs: CandidateSet) -> tuple[np.ndarray, np.ndarray, int]:
    n = len(cs)
    terms = _body_terms(cs.index, cs.tokens)
    if not terms or n == 0:
        return np.zeros(n), np.zeros(n), len(terms)
    # The index's article-major term lists say which clue terms each candidate holds (one
    # compiled call for all candidates).
    pairs = np.array(sorted(terms))  # (term id, rarity) rows, by term id
    count, weight = cs.index.term_overlap(cs.rows, pairs[:, 0].astype(np.int64), pairs[:, 1])
    return count, weight, len(terms)


# Remembered (token -> term id and rarity) lookups per index; cleared past this many.
_MAX_CACHED_TERMS = 200_000


def _body_terms(index: Index, tokens: Sequence[str]) -> list[tuple[int, float]]:
    """(term id, log(N/df)) of each distinct token found in article text, in order.

    Tokens absent from the vocabulary, or only in titles, are left out. Lookups are
    remembered per index, so a clue costs dict lookups instead of a vocabulary search.
    """
    cache = index_cache(index)
    known: dict[str, tuple[int, float] | None] | None = cache.get("body_terms")
    if known is None or len(known) > _MAX_CACHED_TERMS:
        known = cache["body_terms"] = {}
    distinct = dict.fromkeys(tokens)
    try:
        return [r for r in map(known.__getitem__, distinct) if r is not None]
    except KeyError:  # some tokens not seen before: look them up below
        new = [t for t in distinct if t not in known]
    indptr = index.body.indptr
    ids = [index.term_ids([t])[0] for t in new]
    tids = np.array([int(i[0]) if i.size else 0 for i in ids], dtype=np.int64)
    starts, ends = indptr[tids], indptr[tids + 1]
    rarity = np.log(max(index.n_docs, 1) / np.maximum(ends - starts, 1).astype(np.float64))
    for t, i, tid, s, e, r in zip(
        new, ids, tids.tolist(), starts.tolist(), ends.tolist(), rarity.tolist(), strict=True
    ):
        known[t] = (tid, r) if i.size and e > s else None
    return [r for r in map(known.__getitem__, distinct) if r is not None]


@feature("overlap")
def matched_terms(cs: CandidateSet) -> np.ndarray:
    """Distinct clue terms found in the article."""
    return _matched(cs)[0]


@feature("overlap")
def matched_fraction(cs: CandidateSet) -> np.ndarray:
    """Share of the clue's distinct known terms found in the article."""
    count, _, known = _matched(cs)
    return count / known if known else np.zeros(len(cs))


@feature("overlap")
def matched_rarity(cs: CandidateSet) -> np.ndarray:
    """Sum of log(N/df) over the clue terms found in the article."""
    return _matched(cs)[1]


@feature("overlap")
def log_doc_length(cs: CandidateSet) -> np.ndarray:
    """log1p of the article's length in terms."""
    return np.log1p(np.asarray(cs.index.doc_len[cs.rows], dtype=np.float64))


@feature("overlap")
def qualifier_frequency(cs: CandidateSet) -> np.ndarray:
    """log1p of how many titles in the corpus share the candidate's qualifier (0 if none)."""
    return np.log1p(np.array([e.qualifier_count for e in cs.names], dtype=np.float64))


# -- all of the above at once -------------------------------------------------------------
# The functions above define the features and are what the unit tests check by hand. Serving
# computes them together, with as few array operations as possible (at 20 candidates each
# numpy call costs more than the arithmetic): rows of one work array are filled block by
# block, sharing the leader, the softmax, one gather of precomputed per-row values and the
# name and term matches; one take() puts them in FUSED_NAMES order. Built-ins left out of
# FUSED_NAMES still work, one function call each. tests/reranker/test_builtin_fused.py checks
# that the result equals the functions above, column by column.
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
# Rows of the work array, grouped so that each block is written by one operation.
_WORK = (
    "score_softmax", "bm25_score", "(score minus mean)", "gap_to_best_rival",
    "score_ratio_to_top", "score_zscore", "softmax_x_log_words", "score_x_clue_words",
    "bm25_rank", "inverse_rank", "gap_to_next", "clue_words", "log_clue_words",
    # per row, from the row table (_ROW_VALUES order)
    "inlinks", "log_inlinks", "log_popularity", "popularity_missing", "log_doc_length",
    "has_qualifier", "qualifier_frequency", "(filled)",
    "log_inlinks_vs_best",
    # per row and clue: 0 unless a name token of the row is in the clue
    "qualifier_in_clue", "qualifier_overlap", "title_overlap", "alias_overlap",
    "matched_terms", "matched_fraction", "matched_rarity",
)  # fmt: skip
_ORDER = np.array([_WORK.index(name) for name in FUSED_NAMES])
_ROW_VALUES = _WORK[13:21]


def _row_values(index: Index, rows: np.ndarray) -> np.ndarray:
    """The clue-independent values of `rows` (_ROW_VALUES order), by one gather.

    Rows are filled the first time they are candidates; the table starts as zeros, which the
    operating system hands out page by page as rows are touched, so a large index costs
    nothing up front and no loop over the corpus ever runs.
    """
    cache = index_cache(index)
    table: np.ndarray | None = cache.get("row_values")
    if table is None:
        table = cache["row_values"] = np.zeros((len(index), len(_ROW_VALUES)))
    values = table[rows]
    if values[:, -1].all():
        return values
    new = np.unique(rows[values[:, -1] == 0])
    names = row_names(index, new.tolist())
    inl = np.asarray(index.inlinks[new], dtype=np.float64)
    pop = np.asarray(index.popularity[new], dtype=np.float64)
    missing = np.isnan(pop)
    fill = np.empty((new.size, len(_ROW_VALUES)))
    fill[:, 0] = inl
    fill[:, 1] = np.log1p(inl)
    fill[:, 2] = np.log1p(np.where(missing, 0.0, pop))
    fill[:, 3] = missing
    fill[:, 4] = np.log1p(np.asarray(index.doc_len[new], dtype=np.float64))
    fill[:, 5] = [1.0 if e.qualifier_tokens else 0.0 for e in names]
    fill[:, 6] = np.log1p(np.array([e.qualifier_count for e in names], dtype=np.float64))
    fill[:, 7] = 1.0
    table[new] = fill
    return table[rows]


def within_clue(s: list[float], ranks: list[float], mean: float, words: int, f: np.ndarray) -> None:
    """Rows 0-12 of the fused work array (the score features that compare a candidate with
    its rivals, and the clue length), in plain Python: the twin of reranker/_fused.c."""
    n = len(s)
    best = max(s)
    lead = s.index(best)  # the first best, as a stable sort would put it
    exps = [math.exp(x - best) for x in s]
    total = sum(exps)
    soft = [e / total for e in exps]
    centred = [x - mean for x in s]
    sd = math.sqrt(sum(c * c for c in centred) / n)
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


def fused_builtins(cs: CandidateSet) -> np.ndarray:
    """Every feature of FUSED_NAMES, in that order. float64, shape (n, len(FUSED_NAMES))."""
    n = len(cs)
    f = np.empty((len(_WORK), n))  # one contiguous row per feature
    if n == 0:
        return f.T.take(_ORDER, axis=1)
    # retrieval and clue length: rows 0-12, in one compiled call where it is built
    mean = float(np.add.reduce(cs.scores)) / n  # as ndarray.mean() adds
    if _fused is not None:
        ranks = np.asarray(cs.ranks, dtype=np.float64)
        _fused.within_clue(cs.scores, ranks, mean, len(cs.words), f[0:13])
    else:
        within_clue(cs.scores.tolist(), cs.ranks.tolist(), mean, len(cs.words), f)
    # popularity, document length, qualifier: one gather from the row table
    f[13:21] = _row_values(cs.index, cs.rows).T
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
    count, rarity, known = _matched(cs)
    f[26] = count
    np.divide(count, known if known else 1, out=f[27])  # count is all 0 when nothing is known
    f[28] = rarity
    return f.T.take(_ORDER, axis=1)


# The score-only model, the yardstick every other feature set must beat.
SCORE_ONLY = ("bm25_score",)

_BY_NAME = {f.name: f for f in _FEATURES}
if set(FUSED_NAMES) - set(_BY_NAME):
    raise ValueError(f"fused features without a function: {set(FUSED_NAMES) - set(_BY_NAME)}")
_FUSED = FusedFeatures(tuple(_BY_NAME[n] for n in FUSED_NAMES), fused_builtins)


def default_registry() -> FeatureRegistry:
    """A registry of the built-in features."""
    return FeatureRegistry(_FEATURES, fused=_FUSED)
