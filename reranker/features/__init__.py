"""Candidate features: the registry, the built-in definitions and their compiled pass.

Serving and training both compute features through here; nothing in this package fits a
model or reads a log.
"""

from __future__ import annotations

from .builtin import SCORE_ONLY, default_registry
from .candidates import MetadataColumns, candidate_set
from .names import analyze_names, qualifier_counts
from .registry import (
    FEATURE_SET_VERSION,
    CandidateSet,
    DenseInfo,
    Feature,
    FeatureRegistry,
)

__all__ = [
    "FEATURE_SET_VERSION",
    "SCORE_ONLY",
    "CandidateSet",
    "DenseInfo",
    "Feature",
    "FeatureRegistry",
    "MetadataColumns",
    "analyze_names",
    "candidate_set",
    "default_registry",
    "qualifier_counts",
]
