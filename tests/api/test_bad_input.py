"""Bad input gets a 4xx whose message names the field, never a 5xx (in process)."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from api.settings import ServiceSettings, get_settings

GOOD_ID = "0" * 32 + "." + "0" * 24  # well-formed but not signed by the server


def _fields(detail: Any) -> list[str]:
    """Names in the 'loc' of FastAPI's error list (or the message itself)."""
    if isinstance(detail, str):
        return [detail]
    return [".".join(str(p) for p in e["loc"]) for e in detail]


# Statuses as RFC 9110 defines them: 404 Not Found (15.5.5) for an id the server never
# issued, 422 Unprocessable Content (15.5.21) for well-formed JSON with bad fields, 413
# Content Too Large (15.5.14), 400 Bad Request (15.5.1) for a broken Content-Length.
# (path, JSON body, status, text that must appear in a field name or the message)
CASES: list[tuple[str, Any, int, str]] = [
    ("/v1/rank", {"clue": ""}, 422, "body.clue"),
    ("/v1/rank", {"clue": "   \t\n"}, 422, "body.clue"),
    ("/v1/rank", {"clue": 42}, 422, "body.clue"),
    ("/v1/rank", {"clue": None}, 422, "body.clue"),
    ("/v1/rank", {}, 422, "body.clue"),
    ("/v1/rank", {"clue": "x" * 201}, 422, "body.clue"),
    ("/v1/rank", {"clue": "river", "k": 0}, 422, "body.k"),
    ("/v1/rank", {"clue": "river", "k": 11}, 422, "body.k"),
    ("/v1/rank", {"clue": "river", "k": "many"}, 422, "body.k"),
    ("/v1/rank", {"clue": "river", "k": 2.5}, 422, "body.k"),
    ("/v1/rank", {"clue": "river", "include_features": "perhaps"}, 422, "body.include_features"),
    ("/v1/rank", {"clue": "river", "payoff": {"reward": 0}}, 422, "body.payoff.reward"),
    ("/v1/rank", {"clue": "river", "payoff": {"penalty": -1}}, 422, "body.payoff.penalty"),
    ("/v1/rank", {"clue": "river", "payoff": "high"}, 422, "body.payoff"),
    ("/v1/rank", {"clue": "river", "complete": []}, 422, "body.complete"),
    ("/v1/rank", {"clue": "river", "kk": 3}, 422, "body.kk"),
    ("/v1/rank", {"clue": "river", "metadata": [1]}, 422, "body.metadata"),
    ("/v1/rank", ["river"], 422, "body"),
    ("/v1/rank/batch", {"clues": []}, 422, "body.clues"),
    ("/v1/rank/batch", {"clues": "river"}, 422, "body.clues"),
    ("/v1/rank/batch", {"clues": ["river", " "]}, 422, "body.clues.1"),
    ("/v1/rank/batch", {"clues": ["river", "y" * 201]}, 422, "body.clues.1"),
    ("/v1/rank/batch", {"clues": ["river"] * 6}, 422, "body.clues"),
    ("/v1/rank/batch", {"clues": ["river"], "k": 99}, 422, "body.k"),
    ("/v1/feedback", {"request_id": GOOD_ID}, 422, "body.answer"),
    ("/v1/feedback", {"answer": None}, 422, "body.request_id"),
    ("/v1/feedback", {"request_id": 7, "answer": None}, 422, "body.request_id"),
    ("/v1/feedback", {"request_id": "r" * 65, "answer": None}, 422, "body.request_id"),
    ("/v1/feedback", {"request_id": GOOD_ID, "answer": None}, 404, "unknown request_id"),
    ("/v1/feedback", {"request_id": "not-an-id", "answer": None}, 404, "unknown request_id"),
    ("/v1/feedback", {"request_id": GOOD_ID, "answer": ""}, 422, "body.answer"),
    ("/v1/feedback", {"request_id": GOOD_ID, "answer": ["a"]}, 422, "body.answer"),
]


@pytest.fixture
def small_limits(make_client: Any) -> Iterator[Any]:
    """A client whose limits are small enough to hit."""
    with make_client(
        max_clue_chars=200, max_k=10, default_k=5, max_batch=5, max_body_bytes=4096
    ) as c:
        yield c


@pytest.mark.parametrize(("path", "body", "status", "field"), CASES)
def test_bad_json_bodies(small_limits: Any, path: str, body: Any, status: int, field: str) -> None:
    r = small_limits.post(path, json=body)
    assert r.status_code == status, r.text
    assert any(field in f for f in _fields(r.json()["detail"])), r.json()


def test_unknown_answer_is_rejected_naming_the_field(small_limits: Any) -> None:
    rid = small_limits.post("/v1/rank", json={"clue": "river"}).json()["request_id"]
    r = small_limits.post("/v1/feedback", json={"request_id": rid, "answer": "no-such-article"})
    assert r.status_code == 422 and _fields(r.json()["detail"]) == ["body.answer"]
    tampered = rid[:-1] + ("1" if rid[-1] != "1" else "2")
    r = small_limits.post("/v1/feedback", json={"request_id": tampered, "answer": None})
    assert r.status_code == 404


@pytest.mark.parametrize(
    "raw",
    [
        b"{",
        b"not json",
        b'{"clue": "river",}',
        b"\xff\xfe\x00",
        b'{"clue": "\\ud800 river"}',
        b'{"clue": "river", "payoff": {"reward": NaN}}',
        b'{"clue": "river", "k": Infinity}',
        b'{"clue": "river", "metadata": {"w": NaN}}',
    ],
)
def test_malformed_or_non_finite_json_is_4xx(small_limits: Any, raw: bytes) -> None:
    r = small_limits.post("/v1/rank", content=raw, headers={"Content-Type": "application/json"})
    assert 400 <= r.status_code < 500, r.text
    assert r.json()["detail"]


def test_wrong_content_type_is_4xx(small_limits: Any) -> None:
    r = small_limits.post(
        "/v1/rank",
        content=b"clue=river",
        headers={"Content-Type": "application/x-www-form-urlencoded"},
    )
    assert r.status_code == 422


def test_oversize_body_is_413_by_length_and_by_chunks(small_limits: Any) -> None:
    big = json.dumps({"clue": "river " * 2000}).encode()
    r = small_limits.post("/v1/rank", content=big, headers={"Content-Type": "application/json"})
    assert r.status_code == 413 and "4096 bytes" in r.json()["detail"]

    def chunks() -> Iterator[bytes]:  # no Content-Length: sent with chunked encoding
        for i in range(0, len(big), 1000):
            yield big[i : i + 1000]

    r = small_limits.post(
        "/v1/rank", content=chunks(), headers={"Content-Type": "application/json"}
    )
    assert r.status_code == 413 and "4096 bytes" in r.json()["detail"]


def test_bad_content_length_is_400(small_limits: Any) -> None:
    r = small_limits.post(
        "/v1/rank",
        content=b'{"clue": "river"}',
        headers={"Content-Type": "application/json", "Content-Length": "abc"},
    )
    assert r.status_code == 400


def test_unknown_paths_and_methods(small_limits: Any) -> None:
    assert small_limits.get("/v1/nothing").status_code == 404
    assert small_limits.get("/v1/rank").status_code == 405
    assert small_limits.delete("/v1/entries/x").status_code == 405


def test_clue_with_no_indexed_word_is_answered_empty(small_limits: Any) -> None:
    body = small_limits.post("/v1/rank", json={"clue": "zzzzqqq the of"}).json()
    assert body["candidates"] == [] and body["decision"]["action"] == "wait"
    body = small_limits.post("/v1/rank", json={"clue": "zzzzqqq", "complete": True}).json()
    assert body["decision"]["action"] == "abstain"


def test_non_ascii_clue_round_trips(small_limits: Any) -> None:
    clue = "Fluss über dem Tal — 川"
    r = small_limits.post("/v1/rank", json={"clue": clue})
    assert r.status_code == 200 and r.json()["clue"] == clue


def test_settings_dependency_can_be_overridden(make_client: Any, index_dir: Path) -> None:
    with make_client() as c:
        assert c.post("/v1/rank", json={"clue": "river", "k": 5}).status_code == 200
        tight = ServiceSettings(index_dir=index_dir, max_k=3, default_k=2)
        c.app.dependency_overrides[get_settings] = lambda: tight
        r = c.post("/v1/rank", json={"clue": "river", "k": 5})
        assert r.status_code == 422 and _fields(r.json()["detail"]) == ["body.k"]
        assert c.post("/v1/rank", json={"clue": "river"}).json()["k"] == 2
