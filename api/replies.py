"""Rankings turned into JSON replies and served-log records."""

from __future__ import annotations

import math
from typing import Literal, cast

from fastapi import Response
from pydantic import BaseModel

from reranker import Explanation, Ranking, ServedModel, explain_row

from . import schemas as s

Action = Literal["answer", "wait", "abstain"]
Basis = Literal["payoff", "share", "whole_clue", "single", "default"]


def json_reply(model: BaseModel) -> Response:
    """A model's JSON as the response body, bypassing FastAPI's re-validation."""
    # The reply is built from our own validated values; serializing it straight to bytes
    # (pydantic-core) skips FastAPI's second validation pass, a large share of a rank call.
    return Response(model.__pydantic_serializer__.to_json(model), media_type="application/json")


def finite(features: dict[str, float]) -> dict[str, float | None]:
    """Features with NaN/inf as None (JSON has no such numbers); the same dict when all finite."""
    # One C-level sum finds the common all-finite case without a Python loop per value.
    if math.isfinite(sum(features.values())):
        return features  # type: ignore[return-value]
    return {k: v if math.isfinite(v) else None for k, v in features.items()}


def _number(v: float) -> float | None:
    return v if math.isfinite(v) else None


def explanation_out(e: Explanation) -> s.ExplanationOut:
    """An explanation as its reply body (NaN/inf values as null)."""
    return s.ExplanationOut(
        features=[
            s.FeaturePartOut(
                name=p.name,
                value=_number(p.value),
                scaled=_number(p.scaled),
                coefficient=p.coefficient,
                contribution=_number(p.contribution),
            )
            for p in e.parts
        ],
        intercept=e.intercept,
        logit=e.logit,
        raw_probability=e.raw_probability,
        calibration=e.calibration,
        pointwise=e.pointwise,
        how=e.how,
    )


def _explained(model: ServedModel, features: dict[str, float]) -> s.ExplanationOut:
    return explanation_out(explain_row(model, features))


def rank_result(
    request_id: str, r: Ranking, include_features: bool, explain: ServedModel | None = None
) -> s.RankResult:
    """The reply part for one ranked clue; `explain`: the model whose logits to take apart
    (the ranking must carry the candidates' features)."""
    cands = [
        s.CandidateOut(
            id=c.doc_id,
            title=c.title,
            qualifier=c.qualifier,
            score=c.score,
            rank=c.rank,
            probability=c.probability,
            pointwise=c.pointwise,
            features=finite(c.features) if include_features else None,
            explanation=None if explain is None else _explained(explain, c.features),
            snippet=c.snippet,
        )
        for c in r.candidates
    ]
    d = r.decision
    decision = s.DecisionOut(
        action=cast(Action, d.action),
        id=d.doc_id,
        probability=d.probability,
        threshold=d.threshold,
        threshold_basis=cast(Basis, d.basis),
        reason=d.reason,
    )
    return s.RankResult(
        request_id=request_id,
        clue=r.clue,
        candidates=cands,
        decision=decision,
        in_candidates=r.in_candidates,
        none_of_these=r.none_of_these,
    )
