"""POST /v1/rank with explain: each candidate's logit taken apart, checked against the model."""

from __future__ import annotations

import contextlib
import json
import math
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from tests.api.svc_helpers import TestClient
from tests.cli.test_rank import check_explanation


def _logit_from_file(model: dict[str, Any], values: dict[str, float]) -> float:
    """The logit written out from the model file's numbers: standardize, weigh, add."""
    x = np.array([values[n] for n in model["feature_names"]])
    mean, scale = np.array(model["scaler"]["mean"]), np.array(model["scaler"]["scale"])
    return float(np.dot(model["coef"], (x - mean) / scale) + model["intercept"])


def test_explain_reproduces_the_logit_of_every_candidate(
    make_client: Callable[..., contextlib.AbstractContextManager[TestClient]],
    model_path: Path,
    test_questions: list[dict[str, Any]],
) -> None:
    model = json.loads(model_path.read_text())
    clues = [q["clue"] for q in test_questions[:3]]
    with make_client() as client:
        plain = client.post("/v1/rank", json={"clue": clues[0]}).json()
        assert all(c["explanation"] is None for c in plain["candidates"])
        for clue in clues:
            r = client.post(
                "/v1/rank", json={"clue": clue, "explain": True, "include_features": True}
            )
            assert r.status_code == 200, r.text
            for cand in r.json()["candidates"]:
                check_explanation(cand)
                e = cand["explanation"]
                assert e["intercept"] == model["intercept"]
                assert e["calibration"] == model["calibration"]["method"]
                assert {p["name"] for p in e["features"]} == set(model["feature_names"])
                assert e["logit"] == pytest.approx(
                    _logit_from_file(model, cand["features"]), abs=1e-9
                )
                assert "share of the clue's distribution" in e["how"]
        batch = client.post("/v1/rank/batch", json={"clues": clues, "explain": True, "k": 3})
        assert batch.status_code == 200, batch.text
        for result in batch.json()["results"]:
            for cand in result["candidates"]:
                e = cand["explanation"]
                total = e["intercept"] + math.fsum(p["contribution"] for p in e["features"])
                assert total == pytest.approx(e["logit"], abs=1e-9)
                assert e["pointwise"] == pytest.approx(cand["pointwise"], abs=1e-9)


def test_explain_without_a_model_gives_no_explanation(
    make_client: Callable[..., contextlib.AbstractContextManager[TestClient]],
) -> None:
    with make_client(model_path=None) as client:
        r = client.post("/v1/rank", json={"clue": "a mountain above a town", "explain": True})
        assert r.status_code == 200, r.text
        assert all(c["explanation"] is None for c in r.json()["candidates"])
