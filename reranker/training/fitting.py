"""Fitting the reranker's model with scikit-learn: grouped folds, C, calibrators.

Kept apart from model.py so that serving, which loads a model as plain numbers, never
imports scikit-learn (about 140 MB and a second of start-up per worker).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import log_loss
from sklearn.model_selection import GroupKFold
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler

from ..errors import TrainingError
from ..model import apply_calibrator, logit


def make_pipeline_for(C: float, max_iter: int = 5000) -> Pipeline:
    """StandardScaler + LogisticRegression with every setting that matters spelled out."""
    return make_pipeline(
        StandardScaler(),
        LogisticRegression(
            C=C, solver="newton-cholesky", max_iter=max_iter, tol=1e-6, fit_intercept=True
        ),
    )


def grouped_folds(
    y: np.ndarray, groups: np.ndarray, n_folds: int
) -> list[tuple[np.ndarray, np.ndarray]]:
    """GroupKFold splits (folds by clue, never by row) whose training side has both labels."""
    n_groups = np.unique(groups).size
    if n_groups < 2:
        raise TrainingError("cross-validation needs at least two clues")
    splits = list(GroupKFold(n_splits=min(n_folds, n_groups)).split(np.zeros(len(y)), y, groups))
    for train, _ in splits:
        if np.unique(y[train]).size < 2:
            raise TrainingError(
                "a cross-validation fold has only one label; add more labelled clues"
            )
    return splits


def positive_proba(pipe: Pipeline, X: np.ndarray) -> np.ndarray:
    """Probability of label 1, found through classes_."""
    col = int(np.flatnonzero(pipe.classes_ == 1)[0])
    return np.asarray(pipe.predict_proba(X)[:, col])


def oof_proba(
    X: np.ndarray,
    y: np.ndarray,
    splits: list[tuple[np.ndarray, np.ndarray]],
    C: float,
    on_fold: Callable[[], object] | None = None,
    fit: Callable[[np.ndarray, np.ndarray, float], Pipeline] | None = None,
) -> np.ndarray:
    """Out-of-fold probabilities of label 1 for one C; `on_fold` is called after each fold.
    `fit(X, y, C)`: how each fold's pipeline is fitted (default: `make_pipeline_for`)."""
    out = np.zeros(len(y))
    for train, test in splits:
        if fit is None:
            pipe = make_pipeline_for(C).fit(X[train], y[train])
        else:
            pipe = fit(X[train], y[train], C)
        out[test] = positive_proba(pipe, X[test])
        if on_fold is not None:
            on_fold()
    return out


def fit_calibrator(method: str, p: np.ndarray, y: np.ndarray) -> dict[str, Any]:
    """Fit a post-hoc calibrator on held-out probabilities; returns its plain-data form."""
    if method == "platt":
        lr = LogisticRegression(C=1e6, solver="newton-cholesky", max_iter=5000, tol=1e-8).fit(
            logit(p)[:, None], y
        )
        return {"method": "platt", "a": float(lr.coef_[0, 0]), "b": float(lr.intercept_[0])}
    if method == "isotonic":
        iso = IsotonicRegression(y_min=0.0, y_max=1.0, out_of_bounds="clip").fit(p, y)
        return {
            "method": "isotonic",
            "x": iso.X_thresholds_.tolist(),
            "y": iso.y_thresholds_.tolist(),
        }
    return {"method": "none"}


def cross_calibrate(
    p: np.ndarray, y: np.ndarray, groups: np.ndarray, n_folds: int, methods: tuple[str, ...]
) -> tuple[str, dict[str, float], np.ndarray]:
    """Cross-fitted calibration of out-of-fold probabilities: (best method, log-losses, its output).

    Each fold's probabilities are calibrated by a calibrator fitted on the other folds, so
    the output is honest held-out evidence (used to tune the decision threshold).
    """
    splits = grouped_folds(y, groups, n_folds)
    scores: dict[str, float] = {}
    outputs: dict[str, np.ndarray] = {}
    for method in methods:
        if method == "none":
            out = p
        else:
            out = np.zeros_like(p)
            for train, test in splits:
                out[test] = apply_calibrator(fit_calibrator(method, p[train], y[train]), p[test])
        scores[method] = float(log_loss(y, out, labels=[0, 1]))
        outputs[method] = out
    best = min(scores, key=lambda m: (scores[m], m != "none"))
    return best, scores, outputs[best]
