"""Reranker: candidate features, calibrated logistic model, decisions and evaluation."""

from __future__ import annotations

from .builtin import default_registry
from .decision import Decision, Payoff, decide
from .errors import (
    FeatureError,
    LabelledLogError,
    ModelFormatError,
    ModelMismatchError,
    RerankerError,
    TrainingError,
)
from .examples import PrefixPlan, TrainingTable, build_table
from .features import CandidateSet, Feature, FeatureRegistry
from .logs import LabelledClue, read_logs
from .model import Reranker, read_model, save_model
from .pipeline import Ranking, ScoredCandidate, load_model, model_k, rank_clue, rank_clues
from .train import TrainResult, train

__all__ = [
    "CandidateSet",
    "Decision",
    "Feature",
    "FeatureError",
    "FeatureRegistry",
    "LabelledClue",
    "LabelledLogError",
    "ModelFormatError",
    "ModelMismatchError",
    "Payoff",
    "PrefixPlan",
    "Ranking",
    "Reranker",
    "RerankerError",
    "ScoredCandidate",
    "TrainResult",
    "TrainingError",
    "TrainingTable",
    "build_table",
    "decide",
    "default_registry",
    "load_model",
    "model_k",
    "rank_clue",
    "rank_clues",
    "read_logs",
    "read_model",
    "save_model",
    "train",
]
