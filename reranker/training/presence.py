"""Fitting the presence model: P(the answer is among the candidates) from clue-level evidence.

Fitted on out-of-fold pointwise probabilities, so the evidence it learns from looks like what
serving will see; cross-fitted by clue for the held-out figures the decision is tuned on.
"""

from __future__ import annotations

import numpy as np
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import GroupKFold
from sklearn.preprocessing import StandardScaler

from ..presence import PresenceModel, evidence_by_group
from .table import TrainingTable

PRESENCE_C = 1.0  # five well-scaled inputs, thousands of groups: light regularisation suffices
# (common practice, no source)


def _fit(E: np.ndarray, y: np.ndarray) -> PresenceModel:
    """Standardise, then logistic regression; a constant model when only one label occurs."""
    scaler = StandardScaler().fit(E)
    scale = np.where(scaler.scale_ > 0, scaler.scale_, 1.0)
    if np.unique(y).size < 2:
        # Every training clue (or none) had its answer among the candidates: the data say
        # nothing about when it is missing, so give the smoothed rate to every clue.
        rate = (y.sum() + 0.5) / (y.size + 1.0)
        return PresenceModel(
            mean=scaler.mean_,
            scale=scale,
            coef=np.zeros(E.shape[1]),
            intercept=float(np.log(rate / (1 - rate))),
        )
    lr = LogisticRegression(C=PRESENCE_C, solver="newton-cholesky", max_iter=5000, tol=1e-8).fit(
        (E - scaler.mean_) / scale, y
    )
    sign = 1.0 if lr.classes_[1] == 1 else -1.0
    return PresenceModel(
        mean=scaler.mean_,
        scale=scale,
        coef=sign * lr.coef_[0],
        intercept=float(sign * lr.intercept_[0]),
    )


def fit_presence(
    table: TrainingTable, p: np.ndarray, n_folds: int = 5
) -> tuple[PresenceModel, np.ndarray]:
    """Fit on every group; return the model and cross-fitted distribution probabilities q.

    p: out-of-fold pointwise probabilities, one per table row. The q returned are held-out
    twice over (p out of fold, P(among) fitted on other clues), for tuning and reporting.
    """
    starts, E = evidence_by_group(table.group, p, table.score, table.words)
    found = np.maximum.reduceat(table.y.astype(np.int64), starts)
    clues = table.clue_id[starts]
    model = _fit(E, found)
    among = np.zeros(starts.size)
    n_splits = min(n_folds, np.unique(clues).size)
    if n_splits < 2:
        among = model.probability(E)
    else:
        for train, test in GroupKFold(n_splits=n_splits).split(E, found, clues):
            among[test] = _fit(E[train], found[train]).probability(E[test])
    sizes = np.diff(np.r_[starts, table.group.size])
    q = p * np.repeat(among / E[:, 0], sizes)
    return model, q
