"""The built-in candidate features, grouped for the ablation table.

Each function is the definition of its feature, plain numpy or Python over a CandidateSet.
`fused_builtins` computes the FUSED_NAMES columns at once by the compiled pass (fused.py)
where it is built, and by calling these same functions where it is not.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from . import fused
from .clueterms import matched
from .fused import FUSED_NAMES
from .registry import CandidateSet, DenseInfo, Feature, FeatureRegistry, FusedFeatures

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
@feature("overlap")
def matched_terms(cs: CandidateSet) -> np.ndarray:
    """Distinct clue terms found in the article."""
    return matched(cs)[0]


@feature("overlap")
def matched_fraction(cs: CandidateSet) -> np.ndarray:
    """Share of the clue's distinct known terms found in the article."""
    count, _, known = matched(cs)
    return count / known if known else np.zeros(len(cs))


@feature("overlap")
def matched_rarity(cs: CandidateSet) -> np.ndarray:
    """Sum of log(N/df) over the clue terms found in the article."""
    return matched(cs)[1]


@feature("overlap")
def log_doc_length(cs: CandidateSet) -> np.ndarray:
    """log1p of the article's length in terms."""
    return np.log1p(np.asarray(cs.index.doc_len[cs.rows], dtype=np.float64))


@feature("overlap")
def qualifier_frequency(cs: CandidateSet) -> np.ndarray:
    """log1p of how many titles in the corpus share the candidate's qualifier (0 if none)."""
    return np.log1p(np.array([e.qualifier_count for e in cs.names], dtype=np.float64))


# -- dense: what the word vectors say (hybrid candidate sets; 0 without them) -------------
def _dense(cs: CandidateSet) -> DenseInfo | None:
    return cs.dense


@feature("dense")
def cosine(cs: CandidateSet) -> np.ndarray:
    """Cosine of the clue's and the article's word vectors (0 without vectors)."""
    d = _dense(cs)
    return np.zeros(len(cs)) if d is None else d.cosine.astype(np.float64)


@feature("dense")
def cosine_gap_to_best(cs: CandidateSet) -> np.ndarray:
    """Cosine minus the best cosine in the set (0 for the closest article)."""
    d = _dense(cs)
    if d is None or not len(cs):
        return np.zeros(len(cs))
    return d.cosine - d.cosine.max()


@feature("dense")
def dense_inverse_rank(cs: CandidateSet) -> np.ndarray:
    """1 / rank in the word vectors' pool (0 when the vectors did not propose it)."""
    d = _dense(cs)
    if d is None:
        return np.zeros(len(cs))
    r = d.dense_rank.astype(np.float64)
    return np.divide(1.0, r, out=np.zeros_like(r), where=r > 0)


@feature("dense")
def fused_inverse_rank(cs: CandidateSet) -> np.ndarray:
    """1 / position in the fused BM25 + vectors list (1 / BM25 rank without vectors)."""
    d = _dense(cs)
    return 1.0 / (cs.ranks if d is None else d.fused_rank).astype(np.float64)


@feature("dense")
def in_both_pools(cs: CandidateSet) -> np.ndarray:
    """1 when both BM25 and the word vectors proposed the article."""
    d = _dense(cs)
    return np.zeros(len(cs)) if d is None else d.in_both.astype(np.float64)


DENSE = "dense"  # the group a BM25-only candidate set leaves constant

# The score-only model, the yardstick every other feature set must beat.
SCORE_ONLY = ("bm25_score",)

_BY_NAME = {f.name: f for f in _FEATURES}
if set(FUSED_NAMES) - set(_BY_NAME):
    raise ValueError(f"fused features without a function: {set(FUSED_NAMES) - set(_BY_NAME)}")
_FUSED_FUNCS = tuple(_BY_NAME[n].func for n in FUSED_NAMES)


def fused_builtins(cs: CandidateSet) -> np.ndarray:
    """Every feature of FUSED_NAMES, in that order. float64, shape (n, len(FUSED_NAMES)).

    The compiled pass where it is built; elsewhere the functions above, one call each.
    """
    if len(cs) == 0:
        return np.empty((0, len(FUSED_NAMES)))
    out = fused.compiled(cs)
    if out is None:
        out = np.empty((len(cs), len(FUSED_NAMES)))
        for j, func in enumerate(_FUSED_FUNCS):
            out[:, j] = func(cs)
    return out


_FUSED = FusedFeatures(tuple(_BY_NAME[n] for n in FUSED_NAMES), fused_builtins)


def default_registry() -> FeatureRegistry:
    """A registry of the built-in features."""
    return FeatureRegistry(_FEATURES, fused=_FUSED)
