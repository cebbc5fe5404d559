"""The requested k only cuts the reply: probabilities are computed over the model's k."""

from __future__ import annotations

import contextlib
import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from tests.api.svc_helpers import TestClient, read_jsonl, serving_client

N_CLUES = 6  # live-server requests: N_CLUES * model k singles + model k batches


def _model_k(path: Path) -> int:
    return int(json.loads(path.read_text())["training"]["k"])


def _shown(result: dict[str, Any]) -> list[tuple[str, float, int, float]]:
    return [(c["id"], c["score"], c["rank"], c["probability"]) for c in result["candidates"]]


@pytest.mark.slow
@pytest.mark.server
def test_live_service_gives_the_same_probabilities_at_every_k(
    index_dir: Path, model_path: Path, test_questions: list[dict[str, Any]], tmp_path: Path
) -> None:
    model_k = _model_k(model_path)
    clues = [q["clue"] for q in test_questions[:N_CLUES]]
    logs = tmp_path / "logs"
    with serving_client(index_dir, model_path, logs, tmp_path) as c:
        full = []
        for clue in clues:
            r = c.post("/v1/rank", json={"clue": clue, "k": model_k})
            assert r.status_code == 200, r.text
            full.append(r.json())
        assert all(len(f["candidates"]) == model_k for f in full)
        for k in range(1, model_k + 1):
            for clue, ref in zip(clues, full, strict=True):
                body = c.post("/v1/rank", json={"clue": clue, "k": k}).json()
                assert _shown(body) == _shown(ref)[:k], (clue, k)
                assert body["decision"] == ref["decision"], (clue, k)
                assert (body["k"], body["model_k"]) == (k, model_k)
            batch = c.post("/v1/rank/batch", json={"clues": clues, "k": k}).json()
            assert (batch["k"], batch["model_k"]) == (k, model_k)
            for res, ref in zip(batch["results"], full, strict=True):
                assert _shown(res) == _shown(ref)[:k] and res["decision"] == ref["decision"]

        # More than the model's k: refused, naming the field and the model's k.
        for path, body in (
            ("/v1/rank", {"clue": clues[0], "k": model_k + 1}),
            ("/v1/rank/batch", {"clues": clues[:2], "k": model_k + 1}),
        ):
            r = c.post(path, json=body)
            assert r.status_code == 422, r.text
            (err,) = r.json()["detail"]
            assert err["loc"] == ["body", "k"] and f"model's k ({model_k})" in err["msg"]
        assert c.get("/v1/info").json()["limits"]["model_k"] == model_k

    served = [x for x in read_jsonl(logs / "served.jsonl") if x["kind"] == "served"]
    assert len(served) == N_CLUES * (model_k + 1) + N_CLUES * model_k
    assert {x["model_k"] for x in served} == {model_k}
    assert sorted({x["k"] for x in served}) == list(range(1, model_k + 1))
    assert all(len(x["candidates"]) == x["k"] for x in served)


def test_default_k_is_capped_at_the_models_k(
    make_client: Callable[..., contextlib.AbstractContextManager[TestClient]],
    other_model_path: Path,
    test_questions: list[dict[str, Any]],
) -> None:
    model_k = _model_k(other_model_path)
    clue = test_questions[0]["clue"]
    with make_client(model_path=other_model_path) as c:
        assert c.app.state.settings.default_k > model_k  # the server default asks for more
        body = c.post("/v1/rank", json={"clue": clue}).json()
        assert (body["k"], body["model_k"], len(body["candidates"])) == (model_k, model_k, model_k)
        batch = c.post("/v1/rank/batch", json={"clues": [clue]}).json()
        assert (batch["k"], batch["model_k"]) == (model_k, model_k)
        r = c.post("/v1/rank", json={"clue": clue, "k": model_k + 1})
        assert r.status_code == 422 and r.json()["detail"][0]["loc"] == ["body", "k"]


def test_without_a_model_k_goes_up_to_max_k(
    make_client: Callable[..., contextlib.AbstractContextManager[TestClient]],
) -> None:
    with make_client(model_path=None, max_k=30) as c:
        body = c.post("/v1/rank", json={"clue": "river town harbor", "k": 30}).json()
        assert body["model_k"] is None and body["k"] == 30 and len(body["candidates"]) == 30
        assert c.get("/v1/info").json()["limits"]["model_k"] is None
