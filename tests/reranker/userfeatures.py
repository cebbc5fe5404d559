"""Sample user-defined features for the tests (loaded by `module:function` path)."""

from __future__ import annotations

import numpy as np

from reranker import CandidateSet


def title_chars(cs: CandidateSet) -> np.ndarray:
    """Characters in the candidate's title."""
    return np.array([float(len(cs.index.titles[r])) for r in cs.rows.tolist()])


def wrong_shape(cs: CandidateSet) -> np.ndarray:
    """One value too many."""
    return np.zeros(len(cs) + 1)


def gives_nan(cs: CandidateSet) -> np.ndarray:
    """NaN for every candidate."""
    return np.full(len(cs), np.nan)


def crashes(cs: CandidateSet) -> np.ndarray:
    """Raises instead of returning values."""
    raise RuntimeError("deliberate failure")


NOT_A_FUNCTION = 3
