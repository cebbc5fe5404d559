"""Batch commands with `--ray`: blocks of work on a Ray cluster give the in-process output.

One two-CPU Ray cluster is started in the test process for the module; the real console
script joins it by address (`--ray ADDRESS`), so every command here runs its blocks there.
The reference is always the same command without `--ray`.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from retriever import build_index
from tests.api.conftest import demo, index_dir, model_path

from .jsondiff import json_differences
from .test_rank import run

__all__ = ["demo", "index_dir", "model_path"]  # fixtures

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def cluster() -> Iterator[str]:
    """A two-CPU Ray cluster on this machine; its address, for the commands to join."""
    ray = pytest.importorskip("ray", reason="Ray is not installed (pip install '.[cluster]')")
    info = ray.init(num_cpus=2, include_dashboard=False, log_to_driver=False)
    yield str(info.address_info["gcs_address"])
    ray.shutdown()


def _clues(demo: dict[str, Path], tmp: Path, n: int) -> Path:
    lines = [line for f in ("test", "train") for line in demo[f].read_text("utf-8").splitlines()][
        :n
    ]
    path = tmp / "clues.jsonl"
    rows = [{"id": f"c{i}", "clue": json.loads(line)["clue"]} for i, line in enumerate(lines)]
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


def test_rank_file_on_ray_equals_in_process(
    cluster: str, demo: dict[str, Path], index_dir: Path, model_path: Path, tmp_path: Path
) -> None:
    clues = _clues(demo, tmp_path, 290)  # more than one block of 256
    common = ("rank", "--index", index_dir, "--model", model_path, "--input", clues, "--explain")
    here = run(*common, "--output", tmp_path / "here.jsonl")
    assert here.returncode == 0, here.stderr
    there = run(*common, "--output", tmp_path / "ray.jsonl", "--ray", cluster)
    assert there.returncode == 0, there.stderr
    # Ray Data's log on the driver: no deprecated argument (map_batches' concurrency).
    assert "deprecated" not in there.stderr, there.stderr
    want = (tmp_path / "here.jsonl").read_bytes()
    assert (tmp_path / "ray.jsonl").read_bytes() == want
    assert want.count(b"\n") == 290
    out = run(*common, "--ray", cluster)  # to stdout
    assert out.returncode == 0, out.stderr
    assert out.stdout.encode("utf-8") == want
    # A metadata filter and snippets reach the workers too.
    (tmp_path / "f").mkdir()
    few = _clues(demo, tmp_path / "f", 30)
    spec = json.dumps({"kind": {"in": ["town", "river", "island"]}})
    narrowed = ("rank", "--index", index_dir, "--model", model_path, "--input", few,
                "--filter", spec, "--snippet")  # fmt: skip
    here = run(*narrowed)
    there = run(*narrowed, "--ray", cluster)
    assert here.returncode == 0 and there.returncode == 0, here.stderr + there.stderr
    assert there.stdout == here.stdout and '"snippet": "' in here.stdout


def test_rank_on_ray_needs_a_file(cluster: str, index_dir: Path, model_path: Path) -> None:
    res = run("rank", "a clue", "--index", index_dir, "--model", model_path, "--ray", cluster)
    assert res.returncode != 0 and "--ray ranks a file of clues" in res.stderr


def test_features_export_on_ray_equals_in_process(
    cluster: str, demo: dict[str, Path], index_dir: Path, model_path: Path, tmp_path: Path
) -> None:
    common = ("features", "export", "--index", index_dir, "--log", demo["train"],
              "--model", model_path)  # fmt: skip
    here = run(*common, "--out", tmp_path / "here.jsonl")
    assert here.returncode == 0, here.stderr
    there = run(*common, "--out", tmp_path / "ray.jsonl", "--ray", cluster)
    assert there.returncode == 0, there.stderr
    assert "deprecated" not in there.stderr, there.stderr  # the blocks of the table too
    want = (tmp_path / "here.jsonl").read_bytes()
    assert want.count(b"\n") > 1000
    assert (tmp_path / "ray.jsonl").read_bytes() == want
    # The summary: rows, clues, prefixes (all but the file name).
    assert there.stdout.replace("ray.jsonl", "here.jsonl") == here.stdout


# When and how long, and what follows from them (a model's version hashes its file).
# "fit": which fit ran and why, with the memory budget (by default a share of the memory free
# at the time); its method is compared on its own.
VARYING = {
    "created_at",
    "evaluated_at",
    "trained_at",
    "seconds",
    "fit_seconds",
    "model_version",
    "fit",
}


def _differences(x: Any, y: Any) -> list[str]:
    """Where two JSON documents differ, but for VARYING keys and the files' own names."""
    return json_differences(x, y, ignore=VARYING, same_name=("here", "ray"))


def test_train_and_evaluate_on_ray_equal_in_process(
    cluster: str, demo: dict[str, Path], tmp_path: Path
) -> None:
    # Training refines the word vectors with the labelled clues, as the index's vectors were
    # trained: gensim gives the same vectors on every run only on one thread.
    index_dir = tmp_path / "idx"
    build_index(demo["articles"], index_dir, vectors={"threads": 1})
    models = {}
    for name, extra in (("here", ()), ("ray", ("--ray", cluster))):
        out = tmp_path / f"{name}.json"
        res = run("train", "--index", index_dir, "--log", demo["train"], "--out", out, *extra)
        assert res.returncode == 0, res.stderr
        models[name] = json.loads(out.read_text(encoding="utf-8"))
        report = tmp_path / f"report-{name}"
        res = run("evaluate", "--index", index_dir, "--log", demo["test"], "--model", out,
                  "--report", report, "--no-ablation", *extra)  # fmt: skip
        assert res.returncode == 0, res.stderr
    assert _differences(models["here"], models["ray"]) == []
    assert models["here"]["fit"]["method"] == models["ray"]["fit"]["method"] == "memory"
    metrics = [json.loads((tmp_path / f"report-{n}" / "metrics.json").read_text()) for n in models]
    assert _differences(*metrics) == []
    assert metrics[0]["about"]["evaluation"]["clues"] > 50


def test_train_on_ray_takes_a_sample_of_at_most_sample_rows(
    cluster: str, demo: dict[str, Path], index_dir: Path, tmp_path: Path
) -> None:
    out = tmp_path / "m.json"
    res = run("train", "--index", index_dir, "--log", demo["train"], "--out", out,
              "--candidates", "bm25", "--fit", "blocks", "--sample-rows", "1500",
              "--ray", cluster)  # fmt: skip
    assert res.returncode == 0, res.stderr
    fit = json.loads(out.read_text(encoding="utf-8"))["fit"]
    sample = fit["sample"]
    assert sample["cap_rows"] == 1500 and 2 <= sample["clues"] < sample["of_clues"]
    assert fit["driver_rows"] == sample["rows"] <= 1500 < fit["rows"]
