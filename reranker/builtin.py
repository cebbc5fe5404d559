"""The built-in candidate features, grouped for the ablation table."""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from retriever import Index

from .features import CandidateSet, Feature, FeatureRegistry, FusedFeatures, index_cache

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
    docs = cs.index.body.docs
    rows = cs.rows.astype(docs.dtype)  # the postings' dtype, so no posting list is converted
    # One binary search per clue term (a loop over terms, not candidates or the corpus): each
    # posting list is sorted by row, so searching for row and row + 1 gives slots that differ
    # by exactly 1 where the candidate holds the term and 0 where it does not.
    needles = np.concatenate((rows, rows + 1))
    slots = np.array([docs[start:end].searchsorted(needles) for start, end, _ in terms])
    hits = slots[:, n:] - slots[:, :n]
    rarity = np.array([r for _, _, r in terms])
    return hits.sum(axis=0).astype(np.float64), rarity @ hits, len(terms)


# Remembered (token -> posting range) lookups per index; cleared when it grows past this.
_MAX_CACHED_TERMS = 200_000


def _body_terms(index: Index, tokens: Sequence[str]) -> list[tuple[int, int, float]]:
    """(posting start, end, log(N/df)) of each distinct token found in article text, in order.

    Tokens absent from the vocabulary, or only in titles, are left out. Lookups are
    remembered per index, so a clue costs dict lookups instead of a vocabulary search.
    """
    cache = index_cache(index)
    known: dict[str, tuple[int, int, float] | None] | None = cache.get("body_terms")
    if known is None or len(known) > _MAX_CACHED_TERMS:
        known = cache["body_terms"] = {}
    distinct = list(dict.fromkeys(tokens))
    new = [t for t in distinct if t not in known]
    if new:
        indptr = index.body.indptr
        found = [(t, index.term_ids([t])[0]) for t in new]
        tids = np.array([int(ids[0]) if ids.size else 0 for _, ids in found], dtype=np.int64)
        starts, ends = indptr[tids], indptr[tids + 1]
        rarity = np.log(max(index.n_docs, 1) / np.maximum(ends - starts, 1).astype(np.float64))
        for (t, ids), s, e, r in zip(
            found, starts.tolist(), ends.tolist(), rarity.tolist(), strict=True
        ):
            known[t] = (s, e, r) if ids.size and e > s else None
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
# computes them together: one (feature, candidate) array is filled row by row, sharing the
# sorted scores, the softmax, the gathered per-row values and the name-token matches, which
# costs a fraction of calling 27 functions. test_builtin checks it equals them column by column.
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


def _row_arrays(index: Index) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Plain-array views of the index's in-links, popularity and document lengths."""
    cache = index_cache(index)
    arrays: tuple[np.ndarray, np.ndarray, np.ndarray] | None = cache.get("row_arrays")
    if arrays is None:
        arrays = cache["row_arrays"] = (
            np.asarray(index.inlinks),
            np.asarray(index.popularity, dtype=np.float64),
            np.asarray(index.doc_len),
        )
    return arrays


def fused_builtins(cs: CandidateSet) -> np.ndarray:
    """Every feature of FUSED_NAMES, in that order. float64, shape (n, len(FUSED_NAMES))."""
    n = len(cs)
    f = np.empty((len(FUSED_NAMES), n))  # one contiguous row per feature, transposed at the end
    if n == 0:
        return f.T.copy()
    s, rows = cs.scores, cs.rows
    # retrieval
    f[0] = s
    f[1] = cs.ranks
    np.divide(1.0, f[1], out=f[2])
    np.subtract(s[:-1], s[1:], out=f[3, :-1])
    f[3, -1] = 0.0
    listed = s.tolist()
    best = max(listed)
    lead = listed.index(best)  # the first best, as a stable sort would put it
    np.subtract(s, best, out=f[4])  # everyone's best rival is the leader ...
    np.exp(f[4], out=f[7])  # (softmax numerators, before the leader's entry changes)
    if n > 1:  # ... except the leader's, which is the best of the others
        f[4, lead] = best - max(listed[:lead] + listed[lead + 1 :])
    if best > 0:
        np.divide(s, best, out=f[5])
    else:
        f[5] = 0.0
    centred = s - s.mean()
    sd = float(np.sqrt(np.dot(centred, centred) / n))
    if sd > 0:
        np.divide(centred, sd, out=f[6])
    else:
        f[6] = 0.0
    f[7] /= f[7].sum()
    # clue length
    words = len(cs.words)
    log_words = np.log1p(words)
    f[8] = float(words)
    f[9] = log_words
    np.multiply(s, words, out=f[10])
    np.multiply(f[7], log_words, out=f[11])
    # popularity
    inl, pop, doc_len = _row_arrays(cs.index)
    f[12] = inl[rows]
    np.log1p(f[12], out=f[13])
    np.subtract(f[13], f[13].max(), out=f[14])
    p = pop[rows]
    missing = np.isnan(p)
    f[16] = missing
    p[missing] = 0.0
    np.log1p(p, out=f[15])
    # qualifier and leakage: a few set operations per candidate (20 or so, not the corpus)
    names = cs.names
    common = cs.token_set.intersection
    values = []
    for _, base, qual, alias, _count in names:
        in_clue = len(common(qual)) if qual else 0
        values.append(
            (
                1.0 if qual else 0.0,
                1.0 if in_clue else 0.0,
                in_clue / len(qual) if qual else 0.0,
                len(common(base)) / len(base) if base else 0.0,
                len(common(alias)) / len(alias) if alias else 0.0,
            )
        )
    f[17:22].T[...] = values
    # overlap
    count, rarity, known = _matched(cs)
    f[22] = count
    if known:
        np.divide(count, known, out=f[23])
    else:
        f[23] = 0.0
    f[24] = rarity
    f[25] = doc_len[rows]
    np.log1p(f[25], out=f[25])
    f[26] = [e.qualifier_count for e in names]
    np.log1p(f[26], out=f[26])
    return f.T.copy()


# The score-only model, the yardstick every other feature set must beat.
SCORE_ONLY = ("bm25_score",)

_BY_NAME = {f.name: f for f in _FEATURES}
if set(FUSED_NAMES) - set(_BY_NAME):
    raise ValueError(f"fused features without a function: {set(FUSED_NAMES) - set(_BY_NAME)}")
_FUSED = FusedFeatures(tuple(_BY_NAME[n] for n in FUSED_NAMES), fused_builtins)


def default_registry() -> FeatureRegistry:
    """A registry of the built-in features."""
    return FeatureRegistry(_FEATURES, fused=_FUSED)
