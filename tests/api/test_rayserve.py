"""`hunchwise serve --ray`: a sharded index on Ray Serve answers as plain serving of one index.

One local Ray cluster for the module (started here, as `hunchwise serve --ray ADDRESS`
would find a cluster started by `ray start --head`); the sharded server runs as a real
process deployed on it, beside a plain `hunchwise serve` of the unsharded index of the same
corpus. The reference is that plain server: the code whose answers sharding must keep.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import httpx
import pytest

from reranker.training import train
from retriever import load_index
from retriever.shards import build_sharded
from tests.api.svc_helpers import Server, read_jsonl, replies_ok, same_rankings, serve

pytest.importorskip("ray", reason="Ray is not installed (pip install '.[cluster]')")
pytest.importorskip("ray.serve", reason="Ray Serve is not installed (pip install '.[cluster]')")

pytestmark = [pytest.mark.slow, pytest.mark.server]

N_CLUES = 60
K = 20


@pytest.fixture(scope="module")
def sharded_dir(demo: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo corpus built as three shards (in this process: the build is not under test)."""
    return build_sharded(demo["articles"], tmp_path_factory.mktemp("sharded") / "sh", shards=3)


@pytest.fixture(scope="module")
def bm25_model(
    index_dir: Path, demo: dict[str, Path], tmp_path_factory: pytest.TempPathFactory
) -> Path:
    """A model over BM25 candidates."""
    out = tmp_path_factory.mktemp("bm25model") / "model.json"
    train(load_index(index_dir), [demo["train"]], out, candidates="bm25")
    return out


def clues(demo: dict[str, Path]) -> list[str]:
    """The first N_CLUES clues of the demo's questions, test ones first."""
    rows = read_jsonl(demo["test"]) + read_jsonl(demo["train"])
    return [r["clue"] for r in rows[:N_CLUES]]


def rank_all(server: Server, texts: list[str]) -> list[dict[str, Any]]:
    return replies_ok(server, [("POST", "/v1/rank", {"clue": t, "k": K}) for t in texts])


def entries(server: Server, ids: list[str]) -> list[dict[str, Any]]:
    return replies_ok(server, [("GET", f"/v1/entries/{i}", None) for i in ids])


def test_sharded_serving_answers_as_one_index_logs_and_takes_feedback(
    ray_address: str,
    sharded_dir: Path,
    index_dir: Path,
    bm25_model: Path,
    demo: dict[str, Path],
    tmp_path: Path,
) -> None:
    texts = clues(demo)
    assert len(texts) == N_CLUES
    model = ["--model", str(bm25_model)]
    with serve(["--index", str(index_dir), *model], tmp_path) as plain:
        expected = rank_all(plain, texts)
        # Articles of every shard: each clue's best and last candidates.
        ids = sorted({c["id"] for e in expected for c in e["candidates"][:: K - 1]})
        expected_entries = entries(plain, ids)
    logs = tmp_path / "logs"
    args = ["--index", str(sharded_dir), *model, "--log-dir", str(logs), "--ray", ray_address]
    with serve(args, tmp_path, ready_timeout=300) as sharded:
        got = rank_all(sharded, texts)
        got_entries = entries(sharded, ids)
        first = got[0]["candidates"][0]["id"]
        title = got[1]["candidates"][-1]["title"]  # a title is resolved to its article's id
        with httpx.Client(base_url=sharded.url, timeout=60) as c:
            fb = c.post("/v1/feedback", json={"request_id": got[0]["request_id"], "answer": first})
            by_title = c.post(
                "/v1/feedback", json={"request_id": got[1]["request_id"], "answer": title}
            )
            made_up = c.post("/v1/feedback", json={"request_id": "0" * 32, "answer": None})
    assert fb.status_code == 200, fb.text
    assert fb.json()["recorded"] is True
    assert by_title.status_code == 200, by_title.text
    assert got_entries == expected_entries
    assert made_up.status_code == 404  # request ids are still signed

    compared = same_rankings(texts, expected, got)
    assert compared > N_CLUES  # most clues have several candidates

    served = read_jsonl(logs / "served.jsonl")
    assert [r["clue"] for r in served] == texts
    assert {r["request_id"] for r in served} == {g["request_id"] for g in got}
    feedback = read_jsonl(logs / "feedback.jsonl")
    assert [(f["request_id"], f["answer"]) for f in feedback] == [
        (got[0]["request_id"], first),
        (got[1]["request_id"], got[1]["candidates"][-1]["id"]),
    ]


def test_shards_with_other_statistics_refuse_to_start(
    ray_address: str, sharded_dir: Path, bm25_model: Path, tmp_path: Path
) -> None:
    copy = tmp_path / "sh"
    shutil.copytree(sharded_dir, copy)
    manifest = copy / "shard-001" / "manifest.json"
    data = json.loads(manifest.read_text(encoding="utf-8"))
    data["shard"]["stats_sha256"] = "0" * 64  # as if built from other corpus statistics
    manifest.write_text(json.dumps(data), encoding="utf-8")
    cmd = [sys.executable, "-m", "api.cli", "serve", "--index", str(copy)]
    cmd += ["--model", str(bm25_model), "--ray", ray_address, "--port", "8765"]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert proc.returncode != 0
    assert "shard-001" in proc.stderr and "statistics" in proc.stderr, proc.stderr
    assert "Traceback" not in proc.stderr
