"""Many parallel loopback clients against 2 uvicorn workers, with a reload in the middle."""

from __future__ import annotations

import asyncio
import json
import os
import shutil
import time
from collections import Counter
from pathlib import Path
from typing import Any

import httpx
import pytest
from prometheus_client.parser import text_string_to_metric_families

from tests.api.svc_helpers import ADMIN_TOKEN, admin_headers, read_jsonl, serve, stop

pytestmark = [pytest.mark.slow, pytest.mark.server]

CLIENTS = 16  # parallel clients, each with its own connection
ROUNDS = 20  # rank + feedback pairs per client
NEW_ENTRY = {
    "id": "zz-beacon",
    "title": "Ulvenmark (beacon)",
    "text": "The beacon Ulvenmark burns on the headland of Tessarine every winter night.",
}


async def _client(
    url: str,
    n: int,
    questions: list[dict[str, Any]],
    sent: dict[str, Any],
    errors: list[str],
    versions: Counter[str],
    halfway: asyncio.Event,
) -> None:
    async with httpx.AsyncClient(base_url=url, timeout=60) as c:
        for i in range(ROUNDS):
            q = questions[(n * ROUNDS + i) % len(questions)]
            r = await c.post("/v1/rank", json={"clue": q["clue"], "k": 10})
            if r.status_code != 200:
                errors.append(f"rank {r.status_code}: {r.text}")
                continue
            body = r.json()
            versions[body["model_version"]] += 1
            if sum(versions.values()) == CLIENTS * ROUNDS // 2:
                halfway.set()
            answer = q["gold"] if i % 4 else None
            f = await c.post(
                "/v1/feedback", json={"request_id": body["request_id"], "answer": answer}
            )
            if f.status_code != 200:
                errors.append(f"feedback {f.status_code}: {f.text}")
                continue
            sent[body["request_id"]] = answer


async def _reload_midway(
    url: str, swap: Any, results: list[httpx.Response], halfway: asyncio.Event
) -> None:
    await halfway.wait()  # half of the rank requests answered, the other half still to come
    swap()
    async with httpx.AsyncClient(base_url=url, timeout=60) as c:
        results.append(await c.post("/v1/admin/reload", headers=admin_headers()))


async def _load(
    url: str, questions: list[dict[str, Any]], swap: Any
) -> tuple[dict[str, Any], list[str], Counter[str], list[httpx.Response]]:
    halfway = asyncio.Event()
    sent: dict[str, Any] = {}
    errors: list[str] = []
    versions: Counter[str] = Counter()
    reloads: list[httpx.Response] = []
    await asyncio.gather(
        *[_client(url, n, questions, sent, errors, versions, halfway) for n in range(CLIENTS)],
        _reload_midway(url, swap, reloads, halfway),
    )
    return sent, errors, versions, reloads


def _every_worker(url: str, check: Any, workers: int = 2, timeout: float = 20) -> set[int]:
    """Poll over fresh connections until `workers` distinct workers pass `check`."""
    ok: set[int] = set()
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and len(ok) < workers:
        with httpx.Client(base_url=url, timeout=10) as c:
            info = c.get("/v1/info").json()
            if check(c, info):
                ok.add(info["worker_pid"])
        time.sleep(0.02)
    return ok


def test_two_workers_under_load_with_a_reload(
    index_dir: Path,
    model_path: Path,
    other_model_path: Path,
    test_questions: list[dict[str, Any]],
    tmp_path: Path,
) -> None:
    idx = tmp_path / "idx"
    shutil.copytree(index_dir, idx)
    served_model = tmp_path / "model.json"
    shutil.copy(model_path, served_model)
    v1 = json.loads(model_path.read_text())["model_version"]
    v2 = json.loads(other_model_path.read_text())["model_version"]
    logs = tmp_path / "logs"

    def swap() -> None:
        tmp = tmp_path / ".model.tmp"
        shutil.copy(other_model_path, tmp)
        os.replace(tmp, served_model)

    args = [
        "--index",
        str(idx),
        "--model",
        str(served_model),
        "--log-dir",
        str(logs),
        "--log-max-bytes",
        "200000",
        "--log-backups",
        "1000",
    ]
    with serve(args, tmp_path, workers=2, env={"HUNCHWISE_ADMIN_TOKEN": ADMIN_TOKEN}) as server:
        sent, errors, versions, reloads = asyncio.run(_load(server.url, test_questions, swap))
        assert errors == []
        assert len(sent) == CLIENTS * ROUNDS
        assert reloads[0].status_code == 200, reloads[0].text
        assert reloads[0].json()["model_version"] == v2
        assert v1 in versions and set(versions) <= {v1, v2}
        # The reload reached one worker; the other picks it up from the generation marker.
        assert len(_every_worker(server.url, lambda c, info: info["model_version"] == v2)) == 2
        # So does an entries change.
        with httpx.Client(base_url=server.url, timeout=60) as c:
            r = c.post("/v1/admin/entries", json=[NEW_ENTRY], headers=admin_headers())
            assert r.status_code == 200, r.text
        seen = _every_worker(
            server.url,
            lambda c, info: (
                c.get("/v1/entries/zz-beacon").status_code == 200
                and info["index_version"] == r.json()["index_version"]
            ),
        )
        assert len(seen) == 2
        # /metrics sums the workers' samples (prometheus_client multiprocess mode).
        with httpx.Client(base_url=server.url, timeout=10) as c:
            fams = {f.name: f for f in text_string_to_metric_families(c.get("/metrics").text)}
        ranked = [
            s.value
            for s in fams["hunchwise_http_requests"].samples
            if s.labels["endpoint"] == "/v1/rank" and s.labels["status"] == "200"
        ]
        assert ranked == [CLIENTS * ROUNDS]
        assert stop(server) == 0

    lines = [
        json.loads(x)
        for f in [*sorted(logs.glob("served*.jsonl")), logs / "feedback.jsonl"]
        for x in f.read_text(encoding="ascii").splitlines()
    ]
    assert len(list(logs.glob("served*.jsonl"))) > 1  # rotated while both workers wrote
    feedback = Counter(x["request_id"] for x in lines if x["kind"] == "feedback")
    assert set(feedback) == set(sent) and set(feedback.values()) == {1}
    answers = {x["request_id"]: x["answer"] for x in lines if x["kind"] == "feedback"}
    assert answers == sent
    served = [x for x in lines if x["kind"] == "served"]
    assert len(served) == CLIENTS * ROUNDS and {x["request_id"] for x in served} == set(sent)
    assert {x["model_version"] for x in served} <= {v1, v2}
    assert read_jsonl(logs / "served.jsonl")  # the live file parses too
