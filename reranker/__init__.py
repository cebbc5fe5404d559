"""Reranker: candidate features, the calibrated logistic model, ranking and decisions.

This package is the serving side (numpy only). Fitting, evaluation and logs live in
`reranker.training`; the features in `reranker.features`.
"""

from __future__ import annotations

from .decision import Decision, Payoff, decide
from .errors import (
    FeatureError,
    LabelledLogError,
    ModelFormatError,
    ModelMismatchError,
    RerankerError,
    TrainingError,
)
from .explain import Explanation, FeaturePart, explain_row
from .features import CandidateSet, Feature, FeatureRegistry, default_registry
from .loading import ServedModel, load_model, model_k
from .model import LinearModel, read_model, save_model
from .ranking import Ranking, ScoredCandidate, rank_clue, rank_clues

__all__ = [
    "CandidateSet",
    "Decision",
    "Explanation",
    "Feature",
    "FeatureError",
    "FeaturePart",
    "FeatureRegistry",
    "LabelledLogError",
    "LinearModel",
    "ModelFormatError",
    "ModelMismatchError",
    "Payoff",
    "Ranking",
    "RerankerError",
    "ScoredCandidate",
    "ServedModel",
    "TrainingError",
    "decide",
    "default_registry",
    "explain_row",
    "load_model",
    "model_k",
    "rank_clue",
    "rank_clues",
    "read_model",
    "save_model",
]
