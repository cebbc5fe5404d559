"""Endpoint behaviour, in process (TestClient with the lifespan running)."""

from __future__ import annotations

import itertools
import json
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families
from rank_bm25 import BM25Okapi

from reranker.training import read_logs
from retriever import load_index
from tests.api.svc_helpers import read_jsonl

CANDIDATE_KEYS = {"id", "title", "score", "rank", "probability", "pointwise", "features"}
SERVED_KEYS = {
    "kind",
    "request_id",
    "time",
    "clue",
    "k",
    "model_k",
    "in_candidates",
    "complete",
    "index_version",
    "model_version",
    "candidates",
    "decision",
}


@pytest.fixture(scope="module")
def okapi(index_dir: Path, demo: dict[str, Path]) -> tuple[BM25Okapi, dict[str, int]]:
    """Reference BM25 (rank_bm25's BM25Okapi) over the same analyzed corpus."""
    idx = load_index(index_dir)
    records = read_jsonl(demo["articles"])
    corpus = [idx.analyzer.tokens(r["text"]) for r in records]
    p = idx.manifest["bm25"]
    bm = BM25Okapi(corpus, k1=p["k1"], b=p["b"], epsilon=p["epsilon"])
    return bm, {r["id"]: i for i, r in enumerate(records)}


def test_rank_returns_candidates_by_probability_with_reference_bm25(
    client: Any,
    test_questions: list[dict[str, Any]],
    okapi: tuple[BM25Okapi, dict[str, int]],
    index_dir: Path,
    model_path: Path,
) -> None:
    bm, row_of = okapi
    idx = load_index(index_dir)
    model_version = json.loads(model_path.read_text())["model_version"]
    mode = json.loads(model_path.read_text())["candidates"]["mode"]
    for q in test_questions[:10]:
        r = client.post("/v1/rank", json={"clue": q["clue"], "k": 8, "include_features": True})
        assert r.status_code == 200, r.text
        body = r.json()
        cands = body["candidates"]
        assert 0 < len(cands) <= 8
        probs = [c["probability"] for c in cands]
        assert probs == sorted(probs, reverse=True)
        assert all(0.0 <= p <= 1.0 for p in probs)
        # Reference: rank_bm25's BM25Okapi scores of the same tokens (float32 postings: 1e-5).
        ref = bm.get_scores(idx.analyzer.tokens(q["clue"]))
        for c in cands:
            assert c["score"] == pytest.approx(ref[row_of[c["id"]]], rel=1e-5, abs=1e-6)
        # The 8 most probable of the model's k candidates: BM25 ranks may skip, but each is
        # the candidate's place by BM25 score within its candidate set (with BM25-only sets,
        # its place in the reference order over the whole corpus).
        ranks = [c["rank"] for c in cands]
        assert len(set(ranks)) == len(ranks) and max(ranks) <= body["model_k"]
        by_rank = sorted(cands, key=lambda c: c["rank"])
        assert all(a["score"] >= b["score"] for a, b in itertools.pairwise(by_rank))
        if mode == "bm25":
            ref_desc = np.sort(ref)[::-1]
            for c in cands:
                assert ref_desc[c["rank"] - 1] == pytest.approx(c["score"], rel=1e-5)
        info = client.get("/v1/info").json()
        assert all(list(c["features"]) == info["features"] for c in cands)
        assert body["ranked_by"] == "probability" and body["note"] is None
        assert body["index_version"] == idx.version == info["index_version"]
        assert body["model_version"] == model_version == info["model_version"]
        assert body["timing"]["total_ms"] >= body["timing"]["rank_ms"] >= 0
        assert all(c["qualifier"] == idx.document(c["id"]).qualifier for c in cands)


def test_features_only_on_request(client: Any, test_questions: list[dict[str, Any]]) -> None:
    r = client.post("/v1/rank", json={"clue": test_questions[0]["clue"], "k": 3})
    assert all(c["features"] is None for c in r.json()["candidates"])


@pytest.mark.parametrize(("reward", "penalty"), [(3.0, 1.0), (1.0, 1.0), (1.0, 9.0)])
def test_payoff_sets_the_break_even_threshold(
    client: Any, test_questions: list[dict[str, Any]], reward: float, penalty: float
) -> None:
    # Elkan 2001 (cost-sensitive learning): answer when p * reward >= (1 - p) * penalty, i.e.
    # threshold penalty / (reward + penalty); worked example: 3 and 1 give 0.25.
    expected = penalty / (reward + penalty)
    if (reward, penalty) == (3.0, 1.0):
        assert expected == 0.25
    for q in test_questions[:5]:
        for complete in (False, True):
            body = client.post(
                "/v1/rank",
                json={
                    "clue": q["clue"],
                    "payoff": {"reward": reward, "penalty": penalty},
                    "complete": complete,
                },
            ).json()
            d = body["decision"]
            assert d["threshold"] == pytest.approx(expected)
            top = body["candidates"][0]
            if top["probability"] >= expected:
                assert d["action"] == "answer" and d["id"] == top["id"]
            else:
                assert d["action"] == ("abstain" if complete else "wait") and d["id"] is None


def test_without_a_model_ranks_by_bm25_and_says_so(
    make_client: Any, test_questions: list[dict[str, Any]]
) -> None:
    with make_client(model_path=None) as c:
        body = c.post("/v1/rank", json={"clue": test_questions[0]["clue"], "k": 5}).json()
        assert body["ranked_by"] == "bm25" and "no model" in body["note"]
        assert body["model_version"] is None
        assert [x["rank"] for x in body["candidates"]] == [1, 2, 3, 4, 5]
        assert all(x["probability"] is None for x in body["candidates"])
        assert body["decision"]["action"] == "wait"
        assert c.get("/readyz").json() == {
            "ready": True,
            "status": "ready",
            "log_error": None,
            "index_version": body["index_version"],
            "model_version": None,
            "model_configured": False,
        }
        assert c.get("/v1/info").json()["features"] == []


def test_batch_matches_single_requests(client: Any, test_questions: list[dict[str, Any]]) -> None:
    clues = [q["clue"] for q in test_questions[:6]]
    batch = client.post("/v1/rank/batch", json={"clues": clues, "k": 4})
    assert batch.status_code == 200, batch.text
    results = batch.json()["results"]
    assert [r["clue"] for r in results] == clues
    assert len({r["request_id"] for r in results}) == len(clues)
    for clue, res in zip(clues, results, strict=True):
        single = client.post("/v1/rank", json={"clue": clue, "k": 4}).json()
        assert [c["id"] for c in res["candidates"]] == [c["id"] for c in single["candidates"]]
        assert [c["probability"] for c in res["candidates"]] == pytest.approx(
            [c["probability"] for c in single["candidates"]]
        )
        assert res["decision"] == single["decision"]


def test_served_log_has_the_trainer_shape(
    client: Any, tmp_path: Path, test_questions: list[dict[str, Any]]
) -> None:
    q = test_questions[0]
    rid = client.post("/v1/rank", json={"clue": q["clue"], "k": 5}).json()["request_id"]
    batch = client.post("/v1/rank/batch", json={"clues": [q["clue"], "harbour"], "k": 3}).json()
    assert client.post("/v1/feedback", json={"request_id": rid, "answer": q["gold"]}).json() == {
        "request_id": rid,
        "answer": q["gold"],
        "recorded": True,
    }
    other = batch["results"][1]["request_id"]
    assert (
        client.post("/v1/feedback", json={"request_id": other, "answer": None}).status_code == 200
    )
    lines = read_jsonl(tmp_path / "log" / "served.jsonl")
    lines += read_jsonl(tmp_path / "log" / "feedback.jsonl")
    served = [x for x in lines if x["kind"] == "served"]
    assert len(served) == 3 and len(lines) == 5
    for rec in served:
        assert set(rec) == SERVED_KEYS
        # ISO-8601 in UTC (datetime.fromisoformat reads the 'Z' suffix since Python 3.11).
        assert datetime.fromisoformat(rec["time"]).utcoffset() == timedelta(0)
        assert isinstance(rec["k"], int) and rec["complete"] is False
        for c in rec["candidates"]:
            # features are logged only with HUNCHWISE_LOG_FEATURES (training recomputes them)
            assert set(c) == CANDIDATE_KEYS - {"features"}
        assert set(rec["decision"]) == {"action", "id", "probability", "threshold", "reason"}
        # one distribution per clue: the logged shares and "none of these" sum to 1 over the
        # model's k candidates (here k = model_k or fewer, so at most 1)
        shares = sum(c["probability"] for c in rec["candidates"])
        assert 0 < rec["in_candidates"] < 1 and shares <= rec["in_candidates"] + 1e-12
    assert served[0]["request_id"] == rid and served[0]["k"] == 5
    fb = [x for x in lines if x["kind"] == "feedback"]
    assert fb[0] == {
        "kind": "feedback",
        "request_id": rid,
        "time": fb[0]["time"],
        "answer": q["gold"],
    }
    # The trainer's reader joins feedback to what was served, by request id.
    labelled = read_logs([tmp_path / "log"])
    assert sorted((c.clue, c.answer) for c in labelled) == sorted(
        [(q["clue"], q["gold"]), ("harbour", None)]
    )


def test_feedback_twice_is_logged_twice_and_last_wins(
    client: Any, tmp_path: Path, test_questions: list[dict[str, Any]]
) -> None:
    q = test_questions[1]
    rid = client.post("/v1/rank", json={"clue": q["clue"]}).json()["request_id"]
    # The title is accepted for the id and logged as the id it names.
    for answer in (None, q["answer"]):
        r = client.post("/v1/feedback", json={"request_id": rid, "answer": answer})
        assert r.status_code == 200 and r.json()["answer"] == (answer and q["gold"])
    log = tmp_path / "log" / "feedback.jsonl"
    assert [x["answer"] for x in read_jsonl(log) if x["kind"] == "feedback"] == [None, q["gold"]]
    assert [(c.clue, c.answer) for c in read_logs([log.parent])] == [(q["clue"], q["gold"])]


def test_feedback_from_another_worker_is_accepted(
    make_client: Any, test_questions: list[dict[str, Any]]
) -> None:
    # Two apps sharing a state folder stand for two workers: ids of one validate in the other.
    with make_client() as first:
        rid = first.post("/v1/rank", json={"clue": test_questions[0]["clue"]}).json()["request_id"]
    with make_client() as second:
        r = second.post("/v1/feedback", json={"request_id": rid, "answer": None})
        assert r.status_code == 200, r.text
    with make_client(state_dir=None) as stranger:
        r = stranger.post("/v1/feedback", json={"request_id": rid, "answer": None})
        assert r.status_code == 404 and "unknown request_id" in r.json()["detail"]


def test_entry_returns_the_stored_record(client: Any, demo: dict[str, Path]) -> None:
    for rec in read_jsonl(demo["articles"])[:20]:
        body = client.get(f"/v1/entries/{rec['id']}").json()
        assert {k: body[k] for k in ("id", "title", "text", "links", "aliases", "metadata")} == {
            k: rec.get(k, [] if k in ("links", "aliases") else {})
            for k in ("id", "title", "text", "links", "aliases", "metadata")
        }
        assert body["popularity"] == rec.get("popularity")
    r = client.get("/v1/entries/no-such-article")
    assert r.status_code == 404 and "no-such-article" in r.json()["detail"]


def test_health_ready_info_docs(client: Any, index_dir: Path) -> None:
    assert client.get("/healthz").json() == {"status": "ok"}
    ready = client.get("/readyz")
    assert ready.status_code == 200 and ready.json()["ready"] is True
    info = client.get("/v1/info").json()
    assert info["articles"] == load_index(index_dir).n_docs
    assert info["served_log"] is True and info["admin_enabled"] is True
    assert len(info["features"]) > 0
    docs = client.get("/docs")
    assert docs.status_code == 200 and "swagger" in docs.text.lower()
    paths = client.get("/openapi.json").json()["paths"]
    assert {
        "/v1/rank",
        "/v1/rank/batch",
        "/v1/feedback",
        "/v1/entries/{doc_id}",
        "/v1/info",
        "/healthz",
        "/readyz",
        "/metrics",
        "/v1/admin/reload",
        "/v1/admin/entries",
        "/v1/admin/entries/{doc_id}",
    } <= set(paths)


def test_metrics_count_requests_by_endpoint(client: Any) -> None:
    for _ in range(3):
        client.post("/v1/rank", json={"clue": "river bridge"})
    client.post("/v1/rank", json={"clue": ""})
    client.get("/v1/entries/nothing-here")
    text = client.get("/metrics").text
    # Parsed with prometheus_client's reference parser of the text exposition format.
    families = {f.name: f for f in text_string_to_metric_families(text)}
    counts = {
        (s.labels["endpoint"], s.labels["status"]): s.value
        for s in families["hunchwise_http_requests"].samples
        if s.name.endswith("_total")
    }
    assert counts[("/v1/rank", "200")] == 3
    assert counts[("/v1/rank", "422")] == 1
    assert counts[("/v1/entries/{doc_id:path}", "404")] == 1
    buckets = [
        s
        for s in families["hunchwise_http_request_duration_seconds"].samples
        if s.name.endswith("_count") and s.labels["endpoint"] == "/v1/rank"
    ]
    assert buckets[0].value == 4


def test_cors_is_off_unless_configured(make_client: Any) -> None:
    headers = {"Origin": "http://app.example", "Access-Control-Request-Method": "POST"}
    with make_client() as c:
        r = c.get("/healthz", headers=headers)
        assert "access-control-allow-origin" not in r.headers
    with make_client(cors_origins=["http://app.example"]) as c:
        r = c.options("/v1/rank", headers=headers)
        assert r.headers["access-control-allow-origin"] == "http://app.example"
        # The model deploy call is a PUT: a browser's preflight for it must be allowed too.
        put = {"Origin": "http://app.example", "Access-Control-Request-Method": "PUT"}
        r = c.options("/v1/admin/model", headers=put)
        assert r.status_code == 200
        assert "PUT" in r.headers["access-control-allow-methods"]


def test_feedback_naming_no_article_says_ids_titles_and_aliases_are_taken(client: Any) -> None:
    rid = client.post("/v1/rank", json={"clue": "river town", "k": 3}).json()["request_id"]
    r = client.post("/v1/feedback", json={"request_id": rid, "answer": "Nothing Called This"})
    assert r.status_code == 422
    [err] = r.json()["detail"]
    assert err["loc"] == ["body", "answer"]
    assert "no article with id, title or alias 'Nothing Called This'" in err["msg"]


def test_revealed_share_selects_the_schedule_threshold(
    make_client: Any, model_path: Path, tmp_path: Path, test_questions: list[dict[str, Any]]
) -> None:
    # A copy of the session model with a schedule of distinct thresholds, so each share
    # revealed names its own: (0, 0.2] 0.95, (0.2, 0.4] 0.85, ..., (0.8, 1] 0.55.
    art = json.loads(model_path.read_text(encoding="utf-8"))
    thresholds = [0.95, 0.85, 0.75, 0.65, 0.55]
    art["decision"]["schedule"] = {
        "shares": [0.2, 0.4, 0.6, 0.8, 1.0],
        "thresholds": thresholds,
        "none_abstain": None,
    }
    scheduled = tmp_path / "scheduled.json"
    scheduled.write_text(json.dumps(art), encoding="utf-8")
    clue = test_questions[0]["clue"]
    with make_client(model_path=scheduled) as c:
        for revealed, expected in [(0.1, 0.95), (0.2, 0.95), (0.3, 0.85), (0.75, 0.65), (1, 0.55)]:
            body = c.post("/v1/rank", json={"clue": clue, "revealed": revealed}).json()
            d = body["decision"]
            assert (d["threshold"], d["threshold_basis"]) == (expected, "share"), body
            assert body["revealed"] == revealed
            assert f"(revealed {revealed:.2f})" in d["reason"]
            top = body["candidates"][0]["probability"]
            assert d["action"] == ("answer" if top >= expected else "wait")
        d = c.post("/v1/rank", json={"clue": clue}).json()["decision"]
        assert (d["threshold"], d["threshold_basis"]) == (0.55, "whole_clue")
        batch = c.post("/v1/rank/batch", json={"clues": [clue, clue], "revealed": 0.5}).json()
        assert [r["decision"]["threshold"] for r in batch["results"]] == [0.75, 0.75]
        # a payoff in the request still wins over the schedule
        d = c.post(
            "/v1/rank", json={"clue": clue, "revealed": 0.3, "payoff": {"reward": 1, "penalty": 3}}
        ).json()["decision"]
        assert (d["threshold"], d["threshold_basis"]) == (0.75, "payoff")
        for bad in ({"revealed": 0}, {"revealed": 1.5}, {"revealed": "0.5"}):
            r = c.post("/v1/rank", json={"clue": clue, **bad})
            assert r.status_code == 422 and "revealed" in r.text, r.text
        r = c.post("/v1/rank", json={"clue": clue, "revealed": 0.5, "complete": True})
        assert r.status_code == 422 and "revealed must be 1" in r.text, r.text
