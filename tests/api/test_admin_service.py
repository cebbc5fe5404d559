"""Admin calls against a real `hunchwise serve --workers 2` on loopback: auth before the body,
last good files after a crash, reloads reaching every worker, damaged models refused."""

from __future__ import annotations

import json
import os
import shutil
import signal
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
import pytest

from api.lastgood import read_marker
from tests.api.svc_helpers import ADMIN_TOKEN, admin_headers, serve
from tests.api.svc_workers import every_worker, memory_kb, raw_post, reset_peak, worker_pids
from tests.model_damage import CASES, damaged

pytestmark = [pytest.mark.slow, pytest.mark.server]
ENV = {"HUNCHWISE_ADMIN_TOKEN": ADMIN_TOKEN}


def _served(model_path: Path, tmp_path: Path) -> Path:
    served = tmp_path / "served-model.json"
    shutil.copy(model_path, served)
    return served


def _put_in_place(path: Path, text: str) -> None:
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


def _rank_on_one_worker(url: str, clue: str) -> tuple[int, dict[str, Any]]:
    """(worker pid, rank reply) over one fresh connection: both answers come from one worker."""
    with httpx.Client(base_url=url, timeout=30) as c:
        pid = int(c.get("/v1/info").json()["worker_pid"])
        r = c.post("/v1/rank", json={"clue": clue})
        assert r.status_code == 200, r.text
        return pid, r.json()


def test_admin_body_without_token_is_refused_before_it_is_read(
    index_dir: Path, tmp_path: Path
) -> None:
    size = 24_000_000  # bytes of one body: half the default admin limit
    body = b'[{"id": "a", "title": "b", "text": "' + b"x" * size + b'"}]'
    with serve(["--index", str(index_dir)], tmp_path, workers=2, env=ENV) as server:
        port = int(server.url.rsplit(":", 1)[1])
        pids = worker_pids(server.url, 2)
        for pid in pids:
            reset_peak(pid)
        before = {pid: memory_kb(pid)["VmRSS"] for pid in pids}
        tries = [{}, {"Authorization": "Bearer wrong"}, {"Authorization": "Basic x"}]
        with ThreadPoolExecutor(len(tries)) as pool:
            lines = list(pool.map(lambda h: raw_post(port, "/v1/admin/entries", body, h), tries))
        assert all(line.split()[1] == b"401" for line in lines), lines
        # The peak resident size of every worker: nowhere near one body's size (a worker that
        # read and parsed the three bodies grew by several times their size).
        grown = {pid: memory_kb(pid)["VmHWM"] - before[pid] for pid in pids}
        assert all(kb * 1024 < size / 2 for kb in grown.values()), grown
        # With the token, a body over the ordinary limit is still read (the admin limit).
        big = [{"id": "a", "title": "b", "text": "y" * 1_500_000, "popularity": -1}]
        with httpx.Client(base_url=server.url, timeout=60) as c:
            r = c.post("/v1/admin/entries", json=big, headers=admin_headers())
            assert r.status_code == 422, r.text
            assert c.post("/v1/rank", json={"clue": "x" * 10}).status_code == 200


def test_refused_reload_then_a_worker_crash_keeps_serving_the_old_model(
    index_dir: Path, model_path: Path, tmp_path: Path, test_questions: list[dict[str, Any]]
) -> None:
    served = _served(model_path, tmp_path)
    args = ["--index", str(index_dir), "--model", str(served)]
    with serve(args, tmp_path, workers=2, env=ENV) as server:
        with httpx.Client(base_url=server.url, timeout=30) as c:
            old = c.get("/v1/info").json()["model_version"]
            _put_in_place(served, "{ not a model")
            r = c.post("/v1/admin/reload", headers=admin_headers())
            assert r.status_code == 409 and "still serving" in r.json()["detail"], r.text
        first = worker_pids(server.url, 2)
        victim = min(first)
        os.kill(victim, signal.SIGKILL)
        # uvicorn starts a new worker; it loads the last good files, not the broken one.
        ok = every_worker(
            server.url,
            lambda info: info["worker_pid"] != victim and info["model_version"] == old,
            timeout=90,
        )
        assert len(ok) == 2 and victim not in ok, (ok, server.log_text())
        assert server.proc.poll() is None
        for q in test_questions[:10]:
            _, body = _rank_on_one_worker(server.url, q["clue"])
            assert body["model_version"] == old


def test_server_exits_nonzero_when_a_worker_cannot_start(
    index_dir: Path, model_path: Path, tmp_path: Path
) -> None:
    served = _served(model_path, tmp_path)
    state = tmp_path / "state"
    args = ["--index", str(index_dir), "--model", str(served), "--state-dir", str(state)]
    with serve(args, tmp_path, workers=2, env=ENV) as server:
        # Both the configured file and the last good copy are damaged: a new worker cannot
        # load anything, and uvicorn stops the whole server.
        snapshot = read_marker(state).model_path
        assert snapshot is not None
        for path in (served, Path(snapshot)):
            path.write_text("{ damaged", encoding="utf-8")
        os.kill(min(worker_pids(server.url, 2)), signal.SIGKILL)
        server.proc.wait(timeout=120)
        assert server.proc.returncode not in (0, None), server.log_text()
        assert "could not start" in server.log_text()


def test_a_threshold_only_change_reaches_every_worker(
    index_dir: Path, model_path: Path, tmp_path: Path, test_questions: list[dict[str, Any]]
) -> None:
    served = _served(model_path, tmp_path)
    artifact = json.loads(model_path.read_text(encoding="utf-8"))
    # A request without `revealed` gets the whole-clue threshold: the schedule's last one when
    # the model has a schedule, else the single threshold.
    schedule = artifact["decision"].get("schedule")
    where = schedule["thresholds"] if schedule else artifact["decision"]
    slot = len(where) - 1 if schedule else "threshold"
    old_threshold = where[slot]
    new_threshold = 0.91 if old_threshold != 0.91 else 0.76
    clue = test_questions[0]["clue"]
    args = ["--index", str(index_dir), "--model", str(served)]
    with serve(args, tmp_path, workers=2, env=ENV) as server:
        old = _rank_on_one_worker(server.url, clue)[1]
        assert old["decision"]["threshold"] == old_threshold
        # The same fitted numbers, another threshold (as retraining with another payoff
        # gives); the file's own model_version field is left as it was.
        changed = json.loads(json.dumps(artifact))
        if schedule:
            changed["decision"]["schedule"]["thresholds"][-1] = new_threshold
        else:
            changed["decision"]["threshold"] = new_threshold
        _put_in_place(served, json.dumps(changed))
        with httpx.Client(base_url=server.url, timeout=30) as c:
            r = c.post("/v1/admin/reload", headers=admin_headers())
        assert r.status_code == 200, r.text
        new = r.json()["model_version"]
        assert new != old["model_version"]
        seen: dict[int, set[tuple[str, float]]] = {}
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            pid, body = _rank_on_one_worker(server.url, clue)
            seen.setdefault(pid, set()).add((body["model_version"], body["decision"]["threshold"]))
            if len(seen) == 2 and all((new, new_threshold) in v for v in seen.values()):
                break
        assert len(seen) == 2 and all((new, new_threshold) in v for v in seen.values()), seen
        # From then on every answer, from either worker, uses the new threshold.
        for _ in range(30):
            _, body = _rank_on_one_worker(server.url, clue)
            assert (body["model_version"], body["decision"]["threshold"]) == (new, new_threshold)


def test_damaged_models_are_refused_and_the_old_one_keeps_serving(
    index_dir: Path, model_path: Path, tmp_path: Path, test_questions: list[dict[str, Any]]
) -> None:
    served = _served(model_path, tmp_path)
    good = served.read_text(encoding="utf-8")
    artifact = json.loads(good)
    clue = test_questions[0]["clue"]
    args = ["--index", str(index_dir), "--model", str(served)]
    with (
        serve(args, tmp_path, workers=2, env=ENV) as server,
        httpx.Client(base_url=server.url, timeout=30) as c,
    ):
        old = c.get("/v1/info").json()["model_version"]
        for case, damage, field in CASES:
            text = damaged(artifact, damage)
            _put_in_place(served, text)
            r = c.post("/v1/admin/reload", headers=admin_headers())
            assert r.status_code == 409, (case, r.text)
            assert field in r.json()["detail"] and old in r.json()["detail"], (case, r.text)
            _put_in_place(served, good)
            r = c.put(
                "/v1/admin/model",
                content=text,
                headers={**admin_headers(), "Content-Type": "application/json"},
            )
            assert r.status_code == 409 and field in r.json()["detail"], (case, r.text)
            assert served.read_text(encoding="utf-8") == good  # the file in place is untouched
            body = c.post("/v1/rank", json={"clue": clue})
            assert body.status_code == 200 and body.json()["model_version"] == old, case
        # Every worker still serves the old model.
        assert len(every_worker(server.url, lambda i: i["model_version"] == old)) == 2


def test_put_model_deploys_to_every_worker_and_replaces_the_file(
    index_dir: Path, model_path: Path, other_model_path: Path, tmp_path: Path
) -> None:
    served = _served(model_path, tmp_path)
    args = ["--index", str(index_dir), "--model", str(served)]
    with serve(args, tmp_path, workers=2, env=ENV) as server:
        with httpx.Client(base_url=server.url, timeout=30) as c:
            r = c.put(
                "/v1/admin/model",
                content=other_model_path.read_bytes(),
                headers={**admin_headers(), "Content-Type": "application/json"},
            )
        assert r.status_code == 200, r.text
        new = r.json()["model_version"]
        assert new == json.loads(other_model_path.read_text())["model_version"]
        assert len(every_worker(server.url, lambda i: i["model_version"] == new)) == 2
        # Written in place (temp file + rename): a restart with the same --model serves it.
        assert json.loads(served.read_text()) == json.loads(other_model_path.read_text())
        assert sorted(p.name for p in served.parent.glob(".served-model*")) == []
