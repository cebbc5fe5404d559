"""Why a candidate got its probability: each feature's part in the model's logit (numpy only).

The candidate model is logistic on standardized features: a feature's raw value x becomes
(x - mean) / scale, its contribution to the logit is coefficient * scaled value, and

    logit = intercept + sum of contributions,    raw probability = 1 / (1 + exp(-logit)).

A calibrator (Platt or isotonic), when the model has one, turns the raw probability into the
pointwise probability; the served probability is then the candidate's share of the clue's
distribution (`reranker.presence`): pointwise / (sum of the set's pointwise) * in_candidates.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from scipy.special import expit

from .loading import ServedModel
from .model import apply_calibrator


@dataclass(frozen=True)
class FeaturePart:
    """One feature's share of a logit."""

    name: str
    value: float  # as computed for the candidate
    scaled: float  # (value - mean) / scale, what the coefficient multiplies
    coefficient: float
    contribution: float  # coefficient * scaled


@dataclass(frozen=True)
class Explanation:
    """A candidate's logit taken apart, and how its probabilities follow from it."""

    parts: list[FeaturePart]  # by absolute contribution, largest first
    intercept: float
    logit: float  # intercept + the contributions' sum
    raw_probability: float  # 1 / (1 + exp(-logit))
    calibration: str  # none, platt or isotonic
    pointwise: float  # raw_probability after the calibrator (itself when there is none)
    how: str  # the steps in words


def _how(calibration: str) -> str:
    steps = "logit = intercept + sum of contributions (coefficient * (value - mean) / scale); "
    steps += "raw_probability = 1 / (1 + exp(-logit)); "
    if calibration == "none":
        steps += "no calibrator: pointwise = raw_probability; "
    else:
        steps += f"pointwise = the model's {calibration} calibrator applied to raw_probability; "
    return steps + (
        "the served probability is this candidate's share of the clue's distribution: "
        "pointwise / (sum of the candidates' pointwise) * in_candidates"
    )


def explain_row(model: ServedModel, values: Mapping[str, float]) -> Explanation:
    """Take apart the logit of one candidate whose feature values are `values` (by name).

    `values` must hold every column the model reads (a ranking's features with a model).
    """
    lin = model.model
    names = lin.feature_names_
    missing = [n for n in names if n not in values]
    if missing:
        raise ValueError(f"cannot explain: feature values missing for {missing}")
    x = np.array([values[n] for n in names], dtype=np.float64)
    scaled = (x - lin.mean_) / lin.scale_
    contrib = lin.coef_ * scaled
    # Added largest first so the logit is the sum a reader would do from the list.
    order = sorted(range(len(names)), key=lambda i: -abs(contrib[i]))
    parts = [
        FeaturePart(names[i], float(x[i]), float(scaled[i]), float(lin.coef_[i]), float(contrib[i]))
        for i in order
    ]
    logit = lin.intercept_ + math.fsum(p.contribution for p in parts)
    raw = float(expit(logit))
    method = str(lin.calibrator_.get("method", "none"))
    pointwise = float(apply_calibrator(lin.calibrator_, np.array([raw]))[0])
    return Explanation(parts, lin.intercept_, logit, raw, method, pointwise, _how(method))
