"""A hybrid model ranks over a sharded folder (`ShardedView`, shards asked in this process)
as over the unsharded index it was trained on: same candidates, features and probabilities.

The reference is `rank_clues` over the unsharded index of the same demo corpus: the code
whose answers sharding must keep. The model is what `train` makes by default (hybrid
candidates, word vectors refined on the labelled clues and stored as a vector generation
of the index); `index copy-vectors` gives the shards that generation. The sharded build
trains its own base vectors on several threads, so they differ from the single build's:
only the refined generation the model names is used, and it is the same in both.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from reranker import load_model, rank_clues
from reranker.errors import ModelMismatchError
from retriever import load_index
from retriever.shards import build_sharded
from retriever.shardview import ShardedView
from tests.api.svc_helpers import read_jsonl

N_CLUES = 40
FILTER = {"category": {"in": ["place", "person"]}}


def generation(model_path: Path) -> str:
    """The vector generation the model file names (candidates.vectors)."""
    data = json.loads(model_path.read_text(encoding="utf-8"))
    name = data["candidates"]["vectors"]
    assert data["candidates"]["mode"] == "hybrid" and name  # the default model's premise
    return str(name)


@pytest.fixture(scope="module")
def bare_sharded(demo: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo corpus in three shards with their own word vectors, no refined generation."""
    return build_sharded(demo["articles"], tmp_path_factory.mktemp("shh") / "sh", shards=3)


@pytest.fixture(scope="module")
def hybrid_sharded(
    bare_sharded: Path, index_dir: Path, model_path: Path, tmp_path_factory: pytest.TempPathFactory
) -> Path:
    """A copy of `bare_sharded` given the model's generation by `hunchwise index copy-vectors`."""
    out = tmp_path_factory.mktemp("shh-copy") / "sh"
    shutil.copytree(bare_sharded, out)
    cmd = [sys.executable, "-m", "api.cli", "index", "copy-vectors", str(index_dir), str(out)]
    cmd += ["--generation", generation(model_path), "--json"]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=600, check=False)
    assert proc.returncode == 0, proc.stderr
    assert json.loads(proc.stdout)["generations"] == [generation(model_path)]
    return out


def demo_clues(demo: dict[str, Path]) -> list[str]:
    rows = read_jsonl(demo["test"]) + read_jsonl(demo["train"])
    return [r["clue"] for r in rows[:N_CLUES]]


def test_a_hybrid_model_ranks_over_the_shards_as_over_one_index(
    hybrid_sharded: Path, index_dir: Path, model_path: Path, demo: dict[str, Path]
) -> None:
    single = load_index(index_dir)
    view = ShardedView(hybrid_sharded)
    want_model = load_model(model_path, index=single)
    got_model = load_model(model_path, index=view)
    clues = demo_clues(demo)
    for where in (None, FILTER):
        want = rank_clues(single, want_model, clues, include_features=True, where=where)
        got = rank_clues(view, got_model, clues, include_features=True, where=where)
        assert [[c.doc_id for c in r.candidates] for r in got] == [
            [c.doc_id for c in r.candidates] for r in want
        ]
        for w, g in zip(want, got, strict=True):
            assert g.decision == w.decision and g.in_candidates == w.in_candidates
            for cw, cg in zip(w.candidates, g.candidates, strict=True):
                assert cg.score == cw.score
                assert cg.probability == pytest.approx(cw.probability, abs=1e-12, rel=0)
                # Every feature, the dense ones (cosine, dense rank, fused rank, in both)
                # included, is the same number.
                assert cg.features == cw.features, (w.clue, cw.doc_id)
    dense_names = [n for n in want[0].candidates[0].features if "dense" in n or "cos" in n]
    assert dense_names  # the model uses dense evidence
    kept = single.filter_mask(FILTER)
    rows = [single.row_of(c.doc_id) for r in got for c in r.candidates]
    assert rows and all(kept[r] for r in rows)
    # Some candidates came from every shard.
    shard_of = np.searchsorted(view.first_rows, rows, side="right")
    assert set(shard_of.tolist()) == {1, 2, 3}


def test_a_sharded_folder_without_the_models_vectors_says_how_to_copy_them(
    bare_sharded: Path, model_path: Path
) -> None:
    view = ShardedView(bare_sharded)
    with pytest.raises(ModelMismatchError) as err:
        load_model(model_path, index=view)
    text = str(err.value)
    assert f"vector generation {generation(model_path)}" in text
    assert "hunchwise index copy-vectors" in text and str(bare_sharded) in text
