"""Loading a model for serving: the fitted numbers bound to the features, metadata and threshold.

`load_model` returns one frozen `ServedModel`, everything the ranking path needs: the plain
linear model, the feature registry that computes its columns, the metadata columns, the
decision threshold (and the schedule of thresholds by share revealed) and the model's k
(the candidate-set size its features were learned on).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from retriever import Index
from retriever.errors import IndexFormatError

from .candidates import CandidatePolicy, dense_of
from .errors import ModelFormatError, ModelMismatchError
from .features import (
    FEATURE_SET_VERSION,
    FeatureRegistry,
    MetadataColumns,
    default_registry,
    qualifier_counts,
)
from .model import LinearModel, read_model
from .presence import PresenceModel, distribute, evidence
from .schedule import ThresholdSchedule

DEFAULT_K = 20  # candidates per clue when neither the caller nor a model says otherwise


@dataclass(frozen=True)
class ServedModel:
    """A model ready to rank: numbers, the features that feed them, threshold and k."""

    model: LinearModel
    registry: FeatureRegistry
    code_features: tuple[str, ...]  # computed features, in the model's column order
    metadata: MetadataColumns  # metadata columns, after the computed ones
    threshold: float
    k: int
    presence: PresenceModel  # P(the answer is among the candidates), from clue-level evidence
    candidates: CandidatePolicy  # how the candidate sets it was trained on were made
    # One threshold per share of the clue revealed; None (older files): `threshold` throughout.
    schedule: ThresholdSchedule | None = None

    @property
    def version(self) -> str:
        """The model artifact's version."""
        return self.model.version

    @property
    def artifact(self) -> dict[str, Any]:
        """The model file's whole content."""
        return self.model.artifact_

    @property
    def feature_names(self) -> list[str]:
        """Every column the model reads, in order."""
        return self.model.feature_names_

    def probability(self, X: np.ndarray) -> np.ndarray:
        """Pointwise calibrated P(answer) of each row. float64, shape (n,)."""
        return self.model.probability(X)

    def distribution(
        self, p: np.ndarray, scores: np.ndarray, n_words: int
    ) -> tuple[np.ndarray, float]:
        """One clue's candidates' shares of P(among), and P(among) itself.

        p: the set's pointwise probabilities; scores: their BM25 scores; n_words: the clue's
        words. The shares plus 1 - P(among) ("none of these") sum to 1.
        """
        among = float(self.presence.probability(evidence(p, scores, n_words))[0])
        return distribute(p, among), among


def model_k(model: ServedModel) -> int:
    """How many candidates per clue the model was trained on (its features' rival set)."""
    return model.k


def _artifact_k(model: LinearModel, source: str) -> int:
    k = (model.artifact_.get("training") or {}).get("k", DEFAULT_K)
    if not isinstance(k, int) or isinstance(k, bool) or k < 1:
        raise ModelFormatError(
            f"{source}: training.k must be a positive integer, got {k!r}; retrain it"
        )
    return k


def serve(
    model: LinearModel,
    registry: FeatureRegistry,
    *,
    threshold: float | None = None,
    source: str = "<model>",
) -> ServedModel:
    """Bind a fitted model to the registry that computes its features; check they match."""
    data = model.artifact_
    if data.get("feature_set_version") != FEATURE_SET_VERSION:
        raise ModelMismatchError(
            f"{source}: model built with feature set version {data.get('feature_set_version')}, "
            f"this code has "
            f"version {FEATURE_SET_VERSION}; retrain with 'hunchwise train'"
        )
    meta_spec = data.get("metadata_columns") or {}
    meta = MetadataColumns(
        tuple(meta_spec.get("numeric", ())),
        {k: tuple(v) for k, v in meta_spec.get("categorical", {}).items()},
    )
    code_names = [n for n in model.feature_names_ if not n.startswith("meta:")]
    missing = [n for n in code_names if n not in registry]
    extra_meta = [n for n in model.feature_names_ if n.startswith("meta:") and n not in meta.names]
    if missing or extra_meta:
        raise ModelMismatchError(
            f"{source}: the model uses features the running code does not provide: "
            f"{missing + extra_meta}. "
            "Register the user features it was trained with (--feature module:function) or retrain."
        )
    if model.feature_names_ != code_names + meta.names:
        raise ModelMismatchError(
            f"{source}: metadata columns must come after the computed features"
        )
    decision = data.get("decision") or {}
    if threshold is None:
        threshold = decision.get("threshold", 0.5)
    schedule = None
    if decision.get("schedule") is not None:
        try:  # read_model checked every field; a model built in memory is checked here
            schedule = ThresholdSchedule.from_dict(decision["schedule"])
        except (KeyError, TypeError, ValueError) as exc:
            raise ModelFormatError(
                f"{source}: decision.schedule is damaged ({exc}); retrain"
            ) from exc
    return ServedModel(
        model=model,
        registry=registry,
        code_features=tuple(code_names),
        metadata=meta,
        threshold=float(threshold),
        k=_artifact_k(model, source),  # a damaged training.k fails here, not at a request
        presence=PresenceModel.from_dict(data.get("presence"), source=source),
        candidates=CandidatePolicy.from_dict(data.get("candidates"), source=source),
        schedule=schedule,
    )


def load_model(
    path: str | Path,
    *,
    index: Index | None = None,
    registry: FeatureRegistry | None = None,
    user_features: Sequence[str] = (),
) -> ServedModel:
    """Read a model file and check that the running code provides every feature it uses."""
    if Path(path).is_dir():
        raise ModelFormatError(
            f"{path} is a folder, not a model file; give the JSON file 'hunchwise train --out' "
            "wrote"
        )
    model = read_model(path)
    reg = registry if registry is not None else default_registry().with_user_features(user_features)
    served = serve(model, reg, source=str(path))
    if index is not None and served.candidates.mode == "hybrid" and index.dense is None:
        raise ModelMismatchError(
            f"{path}: the model was trained on hybrid candidates (BM25 + word vectors), but "
            f"the index {index.path} has no word vectors; rebuild it without --no-vectors"
        )
    if index is not None and served.candidates.mode == "hybrid" and served.candidates.vectors:
        try:  # open the refined vectors now, so a missing generation fails the load
            dense_of(index, served.candidates)
        except IndexFormatError as exc:
            raise ModelMismatchError(f"{path}: {exc}") from exc
    if index is not None:
        # One pass over the qualifiers before serving; titles are analyzed per row when first
        # seen among the candidates, so a large index costs nothing more here.
        qualifier_counts(index)
    return served
