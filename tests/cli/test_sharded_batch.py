"""Batch commands over a sharded index folder give the unsharded index's output.

The demo corpus is indexed once as one folder and once as three uneven shards; `rank
--input`, `features export`, `evaluate` and `train --candidates bm25` run on both through
the real console script, in this process's machine without Ray, and `rank --input --ray` on
a local Ray cluster (one for the module). The reference is always the unsharded index: the
code whose output sharding must keep. Numbers are compared within 1e-12 (the shards hold
the single build's posting weights bit for bit, README "Past one machine"), strings exactly.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from retriever import build_index
from retriever.shards import build_sharded
from tests.api.conftest import demo

from .jsondiff import json_differences
from .test_rank import run

__all__ = ["demo"]  # fixtures

pytestmark = pytest.mark.slow

TOL = 1e-12
# When, how long, which files and which folder: what differs between two runs that agree.
# index_version names the folder's build (a sharded build's hashes its shard count), and a
# model's version hashes its whole file, index_version included.
VARYING = {
    "created_at",
    "evaluated_at",
    "trained_at",
    "seconds",
    "fit_seconds",
    "model_version",
    "index_version",
    "budget_bytes",
}


@pytest.fixture(scope="module")
def folders(demo: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """The demo corpus as one index and as three uneven shards (57, 233 and 110 articles),
    BM25 only, and a BM25 model trained on the single index."""
    root = tmp_path_factory.mktemp("shardbatch")
    single, sharded = root / "single", root / "sharded"
    build_index(demo["articles"], single, vectors=False)
    build_sharded(demo["articles"], sharded, spans=[(0, 57), (57, 290), (290, 400)], vectors=False)
    model = root / "model.json"
    res = run("train", "--index", single, "--log", demo["train"], "--out", model)
    assert res.returncode == 0, res.stderr
    return {"single": single, "sharded": sharded, "model": model}


def differences(x: Any, y: Any) -> list[str]:
    """Where two JSON documents differ: numbers beyond TOL, anything else at all, but for
    VARYING keys and the two index folders' names."""
    return json_differences(x, y, ignore=VARYING, same_name=("sharded", "single"), tol=TOL)


def lines(path: Path) -> list[Any]:
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def clue_file(demo: dict[str, Path], folder: Path, n: int) -> Path:
    text = demo["test"].read_text("utf-8") + demo["train"].read_text("utf-8")
    rows = [json.loads(line) for line in text.splitlines()][:n]
    path = folder / "clues.jsonl"
    path.write_text("".join(json.dumps({"id": f"c{i}", "clue": r["clue"]}) + "\n"
                            for i, r in enumerate(rows)), encoding="utf-8")  # fmt: skip
    return path


def ranked(folders: dict[str, Path], clues: Path, out: Path, *extra: str) -> list[Any]:
    res = run("rank", "--index", folders[out.stem.split("-")[0]], "--model", folders["model"],
              "--input", clues, "--explain", "--output", out, *extra)  # fmt: skip
    assert res.returncode == 0, res.stderr
    return lines(out)


def test_rank_features_and_evaluate_over_shards_equal_one_index(
    folders: dict[str, Path], demo: dict[str, Path], tmp_path: Path
) -> None:
    clues = clue_file(demo, tmp_path, 80)
    want = ranked(folders, clues, tmp_path / "single.jsonl")
    got = ranked(folders, clues, tmp_path / "sharded.jsonl")
    assert len(want) == 80 and all(len(r["candidates"]) == 20 for r in want)
    assert differences(want, got) == []
    tables = {}
    for name in ("single", "sharded"):
        out = tmp_path / f"{name}-table.jsonl"
        res = run("features", "export", "--index", folders[name], "--log", demo["train"],
                  "--model", folders["model"], "--out", out)  # fmt: skip
        assert res.returncode == 0, res.stderr
        tables[name] = lines(out)
        report = tmp_path / f"report-{name}"
        res = run("evaluate", "--index", folders[name], "--log", demo["test"],
                  "--model", folders["model"], "--report", report, "--no-ablation")  # fmt: skip
        assert res.returncode == 0, res.stderr
    assert len(tables["single"]) > 1000
    assert differences(tables["single"], tables["sharded"]) == []
    metrics = [json.loads((tmp_path / f"report-{n}" / "metrics.json").read_text()) for n in tables]
    assert differences(*metrics) == []


def test_train_with_bm25_candidates_over_shards_equals_one_index(
    folders: dict[str, Path], demo: dict[str, Path], tmp_path: Path
) -> None:
    models = {}
    for name in ("single", "sharded"):
        out = tmp_path / f"{name}.json"
        res = run("train", "--index", folders[name], "--log", demo["train"], "--out", out,
                  "--candidates", "bm25", "--fit-budget", "1G")  # fmt: skip
        assert res.returncode == 0, res.stderr
        models[name] = json.loads(out.read_text(encoding="utf-8"))
    assert models["single"]["training"]["rows"] > 1000
    assert differences(models["single"], models["sharded"]) == []


def test_refining_vectors_on_a_sharded_index_is_refused_naming_the_option(
    demo: dict[str, Path], tmp_path: Path
) -> None:
    sharded = build_sharded(demo["articles"], tmp_path / "sh", shards=2, vectors={"threads": 1})
    res = run("train", "--index", sharded, "--log", demo["train"], "--out", tmp_path / "m.json")
    assert res.returncode != 0
    assert "--no-refine-vectors" in res.stderr and str(sharded) in res.stderr
    assert not (tmp_path / "m.json").exists()


@pytest.fixture(scope="module")
def cluster() -> Iterator[str]:
    """A two-CPU Ray cluster on this machine; its address, for the command to join."""
    ray = pytest.importorskip("ray", reason="Ray is not installed (pip install '.[cluster]')")
    info = ray.init(num_cpus=2, include_dashboard=False, log_to_driver=False)
    yield str(info.address_info["gcs_address"])
    ray.shutdown()


def test_rank_file_on_ray_over_shards_equals_one_index(
    cluster: str, folders: dict[str, Path], demo: dict[str, Path], tmp_path: Path
) -> None:
    clues = clue_file(demo, tmp_path, 290)  # more than one block of 256
    want = ranked(folders, clues, tmp_path / "single.jsonl")
    got = ranked(folders, clues, tmp_path / "sharded-ray.jsonl", "--ray", cluster)
    assert len(want) == 290
    assert differences(want, got) == []
    # The feature table's blocks too: each Ray Data worker opens the sharded folder once.
    tables = []
    for name, extra in (("single", ()), ("sharded", ("--ray", cluster))):
        out = tmp_path / f"{name}-table.jsonl"
        res = run("features", "export", "--index", folders[name], "--log", demo["test"],
                  "--model", folders["model"], "--out", out, *extra)  # fmt: skip
        assert res.returncode == 0, res.stderr
        tables.append(lines(out))
    assert len(tables[0]) > 500
    assert differences(*tables) == []
