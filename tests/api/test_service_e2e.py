"""End to end on a real uvicorn process: index, train, serve, rank, feedback, retrain, reload."""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path
from typing import Any

import httpx
import pytest
from prometheus_client.parser import text_string_to_metric_families

from tests.api.svc_helpers import ADMIN_TOKEN, admin_headers, cli, read_jsonl, serve, stop

pytestmark = [pytest.mark.slow, pytest.mark.server]


def _replace(src: Path, dst: Path) -> None:
    """Copy over the served model file the way an operator should: temp file + rename."""
    tmp = dst.with_name(f".{dst.name}.tmp")
    shutil.copy(src, tmp)
    os.replace(tmp, dst)


def test_index_train_serve_feedback_retrain_reload(
    demo: dict[str, Path], test_questions: list[dict[str, Any]], tmp_path: Path
) -> None:
    idx = tmp_path / "idx"
    cli(["index", "build", str(demo["articles"]), "--out", str(idx), "--json"])
    model1 = tmp_path / "model1.json"
    cli(["train", "--index", str(idx), "--log", str(demo["train"]), "--out", str(model1)])
    served_model = tmp_path / "serving" / "model.json"
    served_model.parent.mkdir()
    _replace(model1, served_model)
    v1 = json.loads(model1.read_text())["model_version"]
    logs = tmp_path / "logs"
    args = ["--index", str(idx), "--model", str(served_model), "--log-dir", str(logs)]
    questions = test_questions[:40]

    with serve(args, tmp_path, env={"HUNCHWISE_ADMIN_TOKEN": ADMIN_TOKEN}) as server:
        with httpx.Client(base_url=server.url, timeout=30) as c:
            info = c.get("/v1/info").json()
            assert info["model_version"] == v1 and info["articles"] > 0
            sent: dict[str, str | None] = {}
            for n, q in enumerate(questions):
                r = c.post("/v1/rank", json={"clue": q["clue"], "k": 10})
                assert r.status_code == 200, r.text
                body = r.json()
                assert body["model_version"] == v1
                ids = [x["id"] for x in body["candidates"]]
                # Every fifth answer says "none of these" when the gold is not shown.
                answer = q["gold"] if (q["gold"] in ids or n % 5) else None
                fb = c.post(
                    "/v1/feedback", json={"request_id": body["request_id"], "answer": answer}
                )
                assert fb.status_code == 200, fb.text
                sent[body["request_id"]] = answer
            # The metrics text parses with prometheus_client's own parser and counts our calls.
            fams = {f.name: f for f in text_string_to_metric_families(c.get("/metrics").text)}
            ranks = [
                s.value
                for s in fams["hunchwise_http_requests"].samples
                if s.labels["endpoint"] == "/v1/rank" and s.labels["status"] == "200"
            ]
            assert ranks == [len(questions)]

            # Retrain from what was served plus the original labelled clues.
            lines = read_jsonl(logs / "feedback.jsonl")  # labels: their own file, never rotated
            assert {x["request_id"]: x["answer"] for x in lines if x["kind"] == "feedback"} == sent
            model2 = tmp_path / "model2.json"
            cli(
                [
                    "train",
                    "--index",
                    str(idx),
                    "--log",
                    str(logs),  # the log folder: served files and feedback
                    "--log",
                    str(demo["train"]),
                    "--out",
                    str(model2),
                ]
            )
            v2 = json.loads(model2.read_text())["model_version"]
            assert v2 != v1
            _replace(model2, served_model)
            # Until the reload the old model keeps answering.
            assert (
                c.post("/v1/rank", json={"clue": questions[0]["clue"]}).json()["model_version"]
                == v1
            )
            assert (
                c.post("/v1/admin/reload", headers={"Authorization": "Bearer nope"}).status_code
                == 401
            )
            r = c.post("/v1/admin/reload", headers=admin_headers())
            assert r.status_code == 200, r.text
            assert r.json()["model_version"] == v2 and r.json()["previous_model_version"] == v1
            after = c.post(
                "/v1/rank", json={"clue": questions[0]["clue"], "include_features": True}
            )
            assert after.json()["model_version"] == v2
            assert c.get("/readyz").json()["model_version"] == v2
            final_id = after.json()["request_id"]
        assert stop(server) == 0
    # Clean shutdown: every request of the run is in the log, each line whole.
    lines = read_jsonl(logs / "served.jsonl")
    served = [x for x in lines if x["kind"] == "served"]
    assert len(served) == len(questions) + 2
    assert served[-1]["request_id"] == final_id and served[-1]["model_version"] == v2
    assert "Traceback" not in server.log_text()
