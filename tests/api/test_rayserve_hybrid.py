"""`hunchwise serve --ray` with a hybrid model: three shards on Ray Serve answer as plain
serving of the unsharded index, with and without a metadata filter.

The model is what `train` makes by default: hybrid candidates (BM25 + word vectors) with
word vectors refined on the labelled clues, stored as a vector generation of the unsharded
index and copied into every shard (`retriever.shardvectors.copy_generations`, the library
call behind `hunchwise index copy-vectors`). The reference is a plain `hunchwise serve` of
the unsharded index: the code whose answers sharding must keep. A Ray cluster of its own
(as in tests/api/test_rayserve.py): Serve keeps its first HTTP port for the cluster's life.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from retriever.shards import build_sharded
from retriever.shardvectors import copy_generations
from tests.api.svc_helpers import Server, read_jsonl, serve

ray = pytest.importorskip("ray", reason="Ray is not installed (pip install '.[cluster]')")
pytest.importorskip("ray.serve", reason="Ray Serve is not installed (pip install '.[cluster]')")

pytestmark = [pytest.mark.slow, pytest.mark.server]

N_CLUES = 40
K = 20
FILTER = {"category": {"in": ["place", "person", "work"]}}


@pytest.fixture(scope="module")
def ray_address() -> Iterator[str]:
    """A local Ray cluster for the module (four logical CPUs: three shards and the front)."""
    ray.init(num_cpus=4, include_dashboard=False, log_to_driver=False)
    yield str(ray.get_runtime_context().gcs_address)
    ray.shutdown()


@pytest.fixture(scope="module")
def hybrid_sharded_dir(
    demo: dict[str, Path],
    index_dir: Path,
    model_path: Path,
    tmp_path_factory: pytest.TempPathFactory,
) -> Path:
    """The demo corpus in three shards, given the vector generation the model names."""
    out = build_sharded(
        demo["articles"], tmp_path_factory.mktemp("hybrid-sharded") / "sh", shards=3
    )
    name = json.loads(model_path.read_text(encoding="utf-8"))["candidates"]["vectors"]
    assert name  # the premise: the default model uses refined vectors
    assert copy_generations(index_dir, out, [name]) == [name]
    return out


def post_all(server: Server, bodies: list[dict[str, Any]]) -> list[dict[str, Any]]:
    with httpx.Client(base_url=server.url, timeout=60) as c:
        replies = [c.post("/v1/rank", json=b) for b in bodies]
    assert all(r.status_code == 200 for r in replies), [r.text for r in replies[:3]]
    return [r.json() for r in replies]


def test_a_hybrid_model_on_sharded_serving_answers_as_one_index_with_and_without_a_filter(
    ray_address: str,
    hybrid_sharded_dir: Path,
    index_dir: Path,
    model_path: Path,
    demo: dict[str, Path],
    tmp_path: Path,
) -> None:
    rows = read_jsonl(demo["test"]) + read_jsonl(demo["train"])
    texts = [r["clue"] for r in rows[:N_CLUES]]
    bodies = [
        {"clue": t, "k": K, "include_features": True, **({"filter": f} if f else {})}
        for f in (None, FILTER)
        for t in texts
    ]
    model = ["--model", str(model_path)]
    with serve(["--index", str(index_dir), *model], tmp_path) as plain:
        expected = post_all(plain, bodies)
    args = ["--index", str(hybrid_sharded_dir), *model, "--ray", ray_address]
    with serve(args, tmp_path, ready_timeout=300) as sharded:
        got = post_all(sharded, bodies)
    compared = 0
    for body, want, have in zip(bodies, expected, got, strict=True):
        assert [c["id"] for c in have["candidates"]] == [c["id"] for c in want["candidates"]], body
        for cw, ch in zip(want["candidates"], have["candidates"], strict=True):
            assert ch["score"] == cw["score"], (body, cw["id"])
            assert ch["probability"] == pytest.approx(cw["probability"], abs=1e-12, rel=0)
            # The dense evidence (cosine, dense rank, fused rank, in both) included.
            assert ch["features"] == cw["features"], (body, cw["id"])
            compared += 1
        assert have["decision"] == want["decision"], body
        assert have.get("filter") == want.get("filter")
    assert compared > len(bodies)
    names = expected[0]["candidates"][0]["features"]
    assert any(k.startswith("dense") or "cos" in k for k in names)
    # The filter acted: other candidates than without it for some clue.
    assert any(
        [c["id"] for c in got[i]["candidates"]] != [c["id"] for c in got[N_CLUES + i]["candidates"]]
        for i in range(N_CLUES)
    )
