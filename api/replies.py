"""Rankings turned into JSON replies.

The rank replies are built as plain dicts, in the field order of their response models
(`schemas.RankResponse`, `schemas.BatchRankResponse`, which document them in the OpenAPI
schema), and encoded once with orjson: the values are the server's own, so validating them
again through the models would only cost time (tests/api/test_reply_shape.py checks that
every reply still validates against its model and has exactly its fields).
"""

from __future__ import annotations

import json
import math
from typing import Any

import orjson
from fastapi import Response
from pydantic import BaseModel

from reranker import Explanation, Ranking, ServedModel, explain_row

from . import schemas as s


def json_bytes(content: Any) -> bytes:
    """Compact JSON: orjson (NaN and infinities as null, as pydantic writes them); what it
    refuses (a string with a lone surrogate) falls back to the standard encoder's ASCII escapes."""
    try:
        return orjson.dumps(content, option=orjson.OPT_SERIALIZE_NUMPY)
    except TypeError:
        text = json.dumps(content, ensure_ascii=True, allow_nan=True, separators=(",", ":"))
        return (
            text.replace("-Infinity", "null")
            .replace("Infinity", "null")
            .replace("NaN", "null")
            .encode("ascii")
        )


def json_reply(content: dict[str, Any] | BaseModel) -> Response:
    """A reply body as JSON bytes, bypassing FastAPI's re-validation of the response model."""
    if isinstance(content, BaseModel):
        return Response(
            content.__pydantic_serializer__.to_json(content), media_type="application/json"
        )
    return Response(json_bytes(content), media_type="application/json")


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


def _explained(model: ServedModel, features: dict[str, float]) -> dict[str, Any]:
    return explanation_out(explain_row(model, features)).model_dump()


def rank_result(
    request_id: str, r: Ranking, include_features: bool, explain: ServedModel | None = None
) -> dict[str, Any]:
    """The reply part for one ranked clue (`schemas.RankResult`'s fields, in its order);
    `explain`: the model whose logits to take apart (the ranking must carry the features)."""
    cands = [
        {
            "id": c.doc_id,
            "title": c.title,
            "qualifier": c.qualifier,
            "score": float(c.score),
            "rank": int(c.rank),
            "probability": c.probability,
            "pointwise": c.pointwise,
            "features": finite(c.features) if include_features else None,
            "explanation": None if explain is None else _explained(explain, c.features),
            "snippet": c.snippet,
        }
        for c in r.candidates
    ]
    d = r.decision
    decision = {
        "action": d.action,
        "id": d.doc_id,
        "probability": d.probability,
        "threshold": d.threshold,
        "threshold_basis": d.basis,
        "reason": d.reason,
    }
    return {
        "request_id": request_id,
        "clue": r.clue,
        "candidates": cands,
        "decision": decision,
        "in_candidates": r.in_candidates,
        "none_of_these": r.none_of_these,
    }
