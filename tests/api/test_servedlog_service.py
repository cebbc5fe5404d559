"""The served log under failure, seen from a real `hunchwise serve --workers 2` on loopback."""

from __future__ import annotations

import json
import shutil
import sys
import textwrap
from contextlib import ExitStack
from pathlib import Path
from typing import Any

import httpx
import pytest

from reranker.servedrecords import SERVED
from reranker.training import read_logs
from reranker.training.logs import LogReport
from tests.api.svc_helpers import Server, read_jsonl, serve, serve_args

pytestmark = pytest.mark.server
BODY = {"clue": "This island exports pearls and wool", "k": 3}


def _clients(server: Server, workers: int, stack: ExitStack) -> list[httpx.Client]:
    """Kept-alive connections until every worker holds at least one (bounded)."""
    clients: list[httpx.Client] = []
    pids: set[int] = set()
    while len(pids) < workers and len(clients) < 40:
        c = stack.enter_context(httpx.Client(base_url=server.url, timeout=60))
        clients.append(c)
        pids.add(int(c.get("/v1/info").json()["worker_pid"]))
    assert len(pids) == workers, f"only workers {pids} took connections"
    return clients


def _pid(c: httpx.Client) -> int:
    return int(c.get("/v1/info").json()["worker_pid"])


def test_the_log_folder_going_away_closes_no_connection(
    index_dir: Path, model_path: Path, tmp_path: Path
) -> None:
    logs = tmp_path / "logs"
    args = serve_args(index_dir, model_path, logs)
    with serve(args, tmp_path, workers=2) as server, ExitStack() as stack:
        clients = _clients(server, 2, stack)
        pids = [_pid(c) for c in clients]
        for c in clients:
            assert c.post("/v1/rank", json=BODY).status_code == 200
        shutil.rmtree(logs)  # a clean-up job removes the folder for a while
        for _ in range(3):
            # New connections take the lowest free descriptor numbers: those the log gave up.
            fresh = [
                stack.enter_context(httpx.Client(base_url=server.url, timeout=60)) for _ in range(3)
            ]
            for c in fresh:
                assert c.post("/v1/rank", json=BODY).status_code == 200
            clients += fresh
            pids += [_pid(c) for c in fresh]
            for c in clients:
                r = c.post("/v1/rank", json=BODY)
                assert r.status_code == 200 and r.json()["candidates"]
        logs.mkdir()  # the folder is back: logging resumes
        for c in clients:
            assert c.post("/v1/rank", json=BODY).status_code == 200
        assert [_pid(c) for c in clients] == pids  # same connections, same live workers
    out = server.log_text()
    assert "Bad file descriptor" not in out and "Traceback" not in out, out
    assert len(read_jsonl(logs / SERVED)) == len(clients)


# Runs the server with a file-size limit (RLIMIT_FSIZE, setrlimit(2)): a write that would grow
# a file past it writes what fits and then fails with EFBIG, as on a full disk. Python ignores
# SIGXFSZ, so the write returns an error instead of killing the worker.
LIMIT = 512 * 1024
WRAPPER = textwrap.dedent(
    f"""
    import os, resource, sys
    resource.setrlimit(resource.RLIMIT_FSIZE, ({LIMIT}, resource.RLIM_INFINITY))
    os.execv(sys.argv[1], sys.argv[1:])
    """
)


def test_a_full_disk_cuts_no_line_and_ranking_goes_on(
    index_dir: Path, model_path: Path, tmp_path: Path, test_questions: list[dict[str, Any]]
) -> None:
    logs = tmp_path / "logs"
    args = serve_args(index_dir, model_path, logs)
    clues = [q["clue"] for q in test_questions]
    batch = {"clues": (clues * (256 // len(clues) + 1))[:256]}  # about 1 MB of served lines
    wrapper = [sys.executable, "-c", WRAPPER]
    with serve(args, tmp_path, workers=2, prefix=wrapper) as server, ExitStack() as stack:
        clients = _clients(server, 2, stack)
        for c in clients:
            assert c.post("/v1/rank", json=BODY).status_code == 200
            before = (logs / SERVED).stat().st_size
            r = c.post("/v1/rank/batch", json=batch)  # does not fit under the limit
            assert r.status_code == 200 and len(r.json()["results"]) == 256
            assert (logs / SERVED).stat().st_size == before  # cut back, whole lines only
            ready = c.get("/readyz")  # the same connection: the worker that failed
            assert ready.status_code == 200
            assert ready.json()["status"] == "degraded"
            assert "too large" in ready.json()["log_error"]
            assert c.post("/v1/rank", json=BODY).status_code == 200  # this one fits
            assert c.get("/readyz").json()["status"] == "ready"
            metrics = c.get("/metrics").text
        failures = [
            line for line in metrics.splitlines()
            if line.startswith("hunchwise_served_log_write_failures_total")
        ]  # fmt: skip
        assert failures and float(failures[0].split()[-1]) == len(clients)
    report = LogReport()
    read_logs([logs], report=report)
    assert report.torn_lines == 0 and report.served == 2 * len(clients)
    assert all(json.loads(x) for x in (logs / SERVED).read_text().splitlines())
