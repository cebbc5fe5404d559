"""POST /v1/rank's fast lane (api/fastlane.py): which requests it takes, and that what it
answers, logs and counts is what the FastAPI route answers, logs and counts."""

from __future__ import annotations

import contextlib
import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

from fastapi.testclient import TestClient
from starlette.types import ASGIApp, Receive, Scope, Send

from api.fastlane import RankFastLane

Factory = Callable[..., contextlib.AbstractContextManager[TestClient]]
# "+json" is JSON to FastAPI (it parses the body) but not to the lane: the FastAPI route.
ROUTE_JSON = "application/vnd.hunchwise+json"


class _Counted:
    """The application behind the lane, counting the requests the lane passes on to it."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app
        self.calls = 0

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http":
            self.calls += 1
        await self.app(scope, receive, send)


def _behind_lane(client: TestClient) -> _Counted:
    """Wrap what sits behind the app's lane (the middleware stack is built once started)."""
    layer: Any = client.app.middleware_stack  # type: ignore[attr-defined]
    while not isinstance(layer, RankFastLane):
        layer = layer.app
    counted = _Counted(layer.app)
    layer.app = counted
    return counted


def _post(client: TestClient, body: Any, content_type: str) -> Any:
    raw = body if isinstance(body, bytes) else json.dumps(body).encode()
    return client.post("/v1/rank", content=raw, headers={"Content-Type": content_type})


def test_plain_json_takes_the_lane_and_gets_the_route_s_reply(
    make_client: Factory, tmp_path: Path
) -> None:
    clues = [
        {"clue": "a quiet island whose chief town exports pearls", "k": 7},
        {"clue": "river", "include_features": True, "explain": True},
        {"clue": "a town", "filter": {"kind": "town"}, "payoff": {"reward": 1, "penalty": 2}},
    ]
    with make_client() as c:
        behind = _behind_lane(c)
        for body in clues:
            fast = _post(c, body, "application/json")
            assert behind.calls == 0, "a well-formed JSON request went past the lane"
            slow = _post(c, body, ROUTE_JSON)
            assert behind.calls == 1
            behind.calls = 0
            assert fast.status_code == slow.status_code == 200
            reply, other = fast.json(), slow.json()
            assert set(reply) == set(other)
            assert {k: v for k, v in reply.items() if k not in ("request_id", "timing")} == {
                k: v for k, v in other.items() if k not in ("request_id", "timing")
            }
        # Both lanes wrote the same served records, apart from ids and times.
        lines = [
            json.loads(x) for x in (tmp_path / "log" / "served.jsonl").read_text().splitlines()
        ]
        served = [x for x in lines if x["kind"] == "served"]
        assert len(served) == 2 * len(clues)
        for fast_rec, slow_rec in zip(served[::2], served[1::2], strict=True):
            drop = ("request_id", "time")
            assert {k: v for k, v in fast_rec.items() if k not in drop} == {
                k: v for k, v in slow_rec.items() if k not in drop
            }
        # The metrics label both by the route's template.
        text = c.get("/metrics").text
        assert 'endpoint="/v1/rank",method="POST",status="200"} 6.0' in text


def test_everything_else_goes_through_fastapi(make_client: Factory) -> None:
    with make_client(max_clue_chars=40) as c:
        behind = _behind_lane(c)
        cases = [
            (b"", "application/json", 422),  # no body: FastAPI's "missing"
            (b"{not json", "application/json", 422),  # FastAPI's "JSON decode error"
            ({"clue": "river", "kk": 3}, "application/json", 422),  # refused by the model
            ({"clue": "river"}, "text/plain", 422),  # not JSON to FastAPI either
        ]
        for body, kind, status in cases:
            r = _post(c, body, kind)
            assert r.status_code == status, (body, r.text)
        assert behind.calls == len(cases)
        bad = _post(c, b"{not json", "application/json").json()["detail"][0]
        assert bad["type"] == "json_invalid" and bad["msg"] == "JSON decode error"
        # Errors raised while ranking come from the application's own handlers, in the lane.
        behind.calls = 0
        long = _post(c, {"clue": "y" * 41}, "application/json")
        unknown = _post(c, {"clue": "river", "filter": {"colour": "red"}}, "application/json")
        assert behind.calls == 0
        assert long.status_code == 422
        assert [e["loc"] for e in long.json()["detail"]] == [["body", "clue"]]
        assert unknown.status_code == 422
        assert unknown.json()["detail"][0]["loc"] == ["body", "filter", "colour"]
        # The same requests through the FastAPI route give the same replies.
        assert _post(c, {"clue": "y" * 41}, ROUTE_JSON).json() == long.json()
        same = _post(c, {"clue": "river", "filter": {"colour": "red"}}, ROUTE_JSON).json()
        assert same == unknown.json()


def test_body_over_the_limit_is_refused_in_the_lane_as_by_fastapi(make_client: Factory) -> None:
    with make_client(max_body_bytes=1024) as c:
        body = json.dumps({"clue": "river", "metadata": {"note": "x" * 2000}}).encode()
        # Streamed without a Content-Length, so only counting the chunks finds it too big.
        chunks = [body[:600], body[600:]]
        fast = c.post(
            "/v1/rank", content=iter(chunks), headers={"Content-Type": "application/json"}
        )
        slow = c.post("/v1/rank", content=iter(chunks), headers={"Content-Type": ROUTE_JSON})
        assert fast.status_code == slow.status_code == 413
        assert fast.json() == slow.json()
