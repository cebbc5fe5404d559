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
from pathlib import Path
from typing import Any

import pytest

from retriever.shards import build_sharded
from retriever.shardvectors import copy_generations
from tests.api.svc_helpers import Server, read_jsonl, replies_ok, same_rankings, serve

pytest.importorskip("ray", reason="Ray is not installed (pip install '.[cluster]')")
pytest.importorskip("ray.serve", reason="Ray Serve is not installed (pip install '.[cluster]')")

pytestmark = [pytest.mark.slow, pytest.mark.server]

N_CLUES = 40
K = 20
FILTER = {"category": {"in": ["place", "person", "work"]}}


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
    return replies_ok(server, [("POST", "/v1/rank", b) for b in bodies])


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
    # The dense evidence (cosine, dense rank, fused rank, in both) included.
    compared = same_rankings(bodies, expected, got, features=True)
    assert [have.get("filter") for have in got] == [want.get("filter") for want in expected]
    assert compared > len(bodies)
    names = expected[0]["candidates"][0]["features"]
    assert any(k.startswith("dense") or "cos" in k for k in names)
    # The filter acted: other candidates than without it for some clue.
    assert any(
        [c["id"] for c in got[i]["candidates"]] != [c["id"] for c in got[N_CLUES + i]["candidates"]]
        for i in range(N_CLUES)
    )
