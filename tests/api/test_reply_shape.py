"""Rank replies are encoded straight from dicts (api/replies.py), not through their response
models: each reply must still be exactly what its model documents in the OpenAPI schema."""

from __future__ import annotations

import json
import math
from typing import Any

import pytest
from pydantic import BaseModel

from api import schemas as s
from api.servedlog import encode_line, encode_lines


def _same_as_model(model: type[BaseModel], body: dict[str, Any]) -> None:
    # Validating and dumping again gives every field the model has, no more: equality means
    # the reply has exactly the model's fields, each of the documented type.
    assert model.model_validate(body).model_dump(mode="json") == body


def test_rank_replies_are_exactly_their_models(
    client: Any, test_questions: list[dict[str, Any]]
) -> None:
    clues = [q["clue"] for q in test_questions[:3]]
    for options in ({}, {"include_features": True, "explain": True, "k": 3}):
        r = client.post("/v1/rank", json={"clue": clues[0], **options})
        assert r.status_code == 200 and r.headers["content-type"] == "application/json"
        _same_as_model(s.RankResponse, r.json())
        b = client.post("/v1/rank/batch", json={"clues": clues, **options})
        assert b.status_code == 200
        _same_as_model(s.BatchRankResponse, b.json())
        assert list(r.json()) == list(s.RankResponse.model_fields)  # same order as before
    without = client.post("/v1/rank", json={"clue": clues[0], "complete": True})
    assert without.json()["decision"]["action"] in ("answer", "abstain")


def test_non_ascii_clue_comes_back_as_sent(client: Any) -> None:
    clue = "Île of the \u00e9t\u00e9 river \U0001f30a"
    r = client.post("/v1/rank", json={"clue": clue, "k": 2})
    assert r.status_code == 200 and r.json()["clue"] == clue


def test_log_lines_refuse_nan_anywhere_and_keep_nulls_and_any_text() -> None:
    line = encode_line({"a": None, "b": [1.5, {"c": None}], "clue": "été"})
    assert json.loads(line) == {"a": None, "b": [1.5, {"c": None}], "clue": "été"}
    assert line.endswith(b"\n") and line.count(b"\n") == 1
    for bad in (math.nan, math.inf, -math.inf):  # JSON has none of them (RFC 8259, section 6)
        with pytest.raises(ValueError):
            encode_lines([{"ok": 1}, {"candidates": [{"probability": bad}]}])
    odd = encode_line({"clue": "lone \ud800 half"})  # not UTF-8-encodable: ASCII escapes
    assert odd.isascii() and json.loads(odd)["clue"] == "lone \ud800 half"


def test_rank_with_fsync_logging_runs_in_the_pool_and_logs(
    make_client: Any, tmp_path: Any, test_questions: list[dict[str, Any]]
) -> None:
    # With log_fsync every write waits for the disk, so /v1/rank takes the thread-pool path.
    with make_client(log_fsync=True) as c:
        r = c.post("/v1/rank", json={"clue": test_questions[0]["clue"], "k": 2})
        assert r.status_code == 200
        _same_as_model(s.RankResponse, r.json())
    lines = (tmp_path / "log" / "served.jsonl").read_text(encoding="utf-8").splitlines()
    assert [json.loads(x)["request_id"] for x in lines] == [r.json()["request_id"]]
