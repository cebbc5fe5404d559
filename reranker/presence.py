"""One distribution per clue: how likely the answer is among the candidates at all.

The candidate model is pointwise: each candidate's probability is learned on its own, so a
clue's probabilities need not sum to anything in particular. A second, small logistic model
reads clue-level evidence (the pointwise probabilities' sum and maximum, the clue's length,
the top BM25 score and how far it stands above the rest) and gives P(the answer is among the
candidates). Each candidate's share of that is its pointwise probability over their sum:

    q_i = p_i / sum_j p_j * P(among)        and        P(none of these) = 1 - P(among)

so the q_i and the "none" share form one distribution that sums to 1. This module holds the
serving half (numpy only); `reranker.training.presence` fits it.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy.special import expit

from .errors import ModelFormatError

# Clue-level evidence, in the order the presence model reads it.
EVIDENCE = ("sum_p", "max_p", "log_words", "top_score", "score_spread")


def evidence(p: np.ndarray, scores: np.ndarray, n_words: int) -> np.ndarray:
    """Clue-level evidence of one candidate set. float64, shape (len(EVIDENCE),).

    p: the candidates' pointwise probabilities; scores: their BM25 scores; n_words: words in
    the clue (the analyzer's words). score_spread is the top score over the set's mean score
    (1 when all tie; BM25 scores are never negative, so the ratio is defined when the mean is
    above 0, and 1 otherwise).
    """
    top = float(scores.max()) if scores.size else 0.0
    mean = float(scores.mean()) if scores.size else 0.0
    return np.array(
        [
            float(p.sum()),
            float(p.max()) if p.size else 0.0,
            math.log1p(n_words),
            top,
            top / mean if mean > 0 else 1.0,
        ]
    )


def evidence_by_group(
    group: np.ndarray, p: np.ndarray, scores: np.ndarray, n_words: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """`evidence` for every group of a table at once: (group starts, matrix of shape (g, 5)).

    Rows must be sorted by group (a training table is). Vectorised with reduceat, so a
    table of a million rows takes milliseconds; `test_presence` checks it row for row
    against `evidence`.
    """
    starts = np.flatnonzero(np.r_[True, group[1:] != group[:-1]]) if group.size else group
    sizes = np.diff(np.r_[starts, group.size])
    s_sum = np.add.reduceat(scores, starts)
    top = np.maximum.reduceat(scores, starts)
    mean = s_sum / sizes
    spread = np.divide(top, mean, out=np.ones_like(top), where=mean > 0)
    return starts, np.column_stack(
        [
            np.add.reduceat(p, starts),
            np.maximum.reduceat(p, starts),
            np.log1p(n_words[starts].astype(np.float64)),
            top,
            spread,
        ]
    )


class PresenceModel:
    """Logistic model of P(answer among the candidates) from clue-level evidence (plain data)."""

    def __init__(
        self, *, mean: np.ndarray, scale: np.ndarray, coef: np.ndarray, intercept: float
    ) -> None:
        self.mean_ = np.asarray(mean, dtype=np.float64)
        self.scale_ = np.asarray(scale, dtype=np.float64)
        self.coef_ = np.asarray(coef, dtype=np.float64)
        self.intercept_ = float(intercept)

    def probability(self, E: np.ndarray) -> np.ndarray:
        """P(among the candidates) for rows of evidence. float64, shape (n,)."""
        z = ((np.atleast_2d(np.asarray(E, dtype=np.float64)) - self.mean_) / self.scale_) @ (
            self.coef_
        ) + self.intercept_
        return np.asarray(expit(z), dtype=np.float64)

    def to_dict(self) -> dict[str, Any]:
        """The model as plain JSON data (a section of the model file)."""
        return {
            "evidence": list(EVIDENCE),
            "mean": self.mean_.tolist(),
            "scale": self.scale_.tolist(),
            "coef": self.coef_.tolist(),
            "intercept": self.intercept_,
        }

    @classmethod
    def from_dict(cls, data: Any, *, source: str = "<model>") -> PresenceModel:
        """Read the section back, checking every field."""
        where = f"{source}: presence"
        if not isinstance(data, dict):
            raise ModelFormatError(f"{where} must be an object; retrain the model")
        if data.get("evidence") != list(EVIDENCE):
            raise ModelFormatError(
                f"{where}.evidence is {data.get('evidence')!r}, this code reads "
                f"{list(EVIDENCE)}; retrain the model"
            )
        arrays = {}
        for name in ("mean", "scale", "coef"):
            try:
                a = np.asarray(data.get(name), dtype=np.float64)
            except (TypeError, ValueError):
                a = np.zeros(0)
            if a.shape != (len(EVIDENCE),) or not np.all(np.isfinite(a)):
                raise ModelFormatError(
                    f"{where}.{name} must be {len(EVIDENCE)} finite numbers; retrain the model"
                )
            arrays[name] = a
        if not np.all(arrays["scale"] > 0):
            raise ModelFormatError(f"{where}.scale must be positive; retrain the model")
        intercept = data.get("intercept")
        if (
            not isinstance(intercept, int | float)
            or isinstance(intercept, bool)
            or not math.isfinite(intercept)
        ):
            raise ModelFormatError(f"{where}.intercept must be a finite number; retrain the model")
        return cls(intercept=float(intercept), **arrays)


def distribute(p: np.ndarray, among: float) -> np.ndarray:
    """Each candidate's share of P(among): p_i / sum p_j * among. float64, same shape as p."""
    total = float(p.sum())
    if total <= 0:
        return np.zeros_like(p, dtype=np.float64)
    return np.asarray(p, dtype=np.float64) * (among / total)


def distribute_groups(
    model: PresenceModel, group: np.ndarray, p: np.ndarray, scores: np.ndarray, n_words: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """`distribute` over every group of a table: (q per row, P(among) per group).

    Rows must be sorted by group. Gives what ranking each group on its own would give.
    """
    if group.size == 0:
        return np.zeros(0), np.zeros(0)
    starts, E = evidence_by_group(group, p, scores, n_words)
    among = model.probability(E)
    sizes = np.diff(np.r_[starts, group.size])
    factor = np.repeat(among / E[:, 0], sizes)
    return p * factor, among
