"""`hunchwise features export`: the training table as a file, row for row what the model sees."""

from __future__ import annotations

import contextlib
import csv
import json
from collections import defaultdict
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from reranker.training import PrefixPlan
from retriever import load_index
from tests.api.conftest import demo, index_dir, make_client, model_path
from tests.api.svc_helpers import TestClient
from tests.cli.test_rank import read_jsonl, run

__all__ = ["demo", "index_dir", "make_client", "model_path"]  # fixtures

N_CHECKED = 12  # prefixes sent to the service


@pytest.mark.slow
def test_export_has_one_row_per_prefix_and_candidate_with_the_models_values(
    demo: dict[str, Path],
    index_dir: Path,
    model_path: Path,
    make_client: Callable[..., contextlib.AbstractContextManager[TestClient]],
    tmp_path: Path,
) -> None:
    model = json.loads(model_path.read_text())
    out = tmp_path / "table.jsonl"
    res = run("features", "export", "--index", index_dir, "--log", demo["train"],
              "--model", model_path, "--out", out, "--json")  # fmt: skip
    assert res.returncode == 0, res.stderr
    rows = read_jsonl(out)
    summary = json.loads(res.stdout)
    assert summary["rows"] == len(rows) == model["training"]["rows"]
    names = model["feature_names"]
    head = ["clue_id", "file", "line", "prefix_share", "prefix_words", "prefix", "candidate_id"]
    assert list(rows[0]) == [*head, "label", *names]

    # One row per (prefix, candidate): each prefix lists distinct candidates, at most k.
    prefixes: dict[tuple[int, int], list[dict[str, Any]]] = defaultdict(list)
    for row in rows:
        prefixes[row["clue_id"], row["prefix_words"]].append(row)
    k = model["training"]["k"]
    assert len(prefixes) <= summary["prefixes"] == model["training"]["prefixes"]
    for group in prefixes.values():
        ids = [r["candidate_id"] for r in group]
        assert len(set(ids)) == len(ids) <= k
        assert len({r["prefix"] for r in group}) == 1
    # The prefixes are those the plan keeps (less any without a candidate at all, which have
    # no rows), and the label marks the gold answer.
    index = load_index(index_dir)
    logged = read_jsonl(demo["train"])
    plan = PrefixPlan(tuple(model["training"]["prefix_plan"]["fractions"]))
    by_clue: dict[int, set[int]] = defaultdict(set)
    for cid, words in prefixes:
        by_clue[cid].add(words)
    for cid, words in by_clue.items():
        first = prefixes[cid, min(words)][0]
        q = logged[first["line"] - 1]
        assert 1 <= len(words) <= len(plan.cuts(len(q["clue"].split())))
        gold = index.resolve(q["answer"])
        for w in words:
            for r in prefixes[cid, w]:
                assert r["label"] == int(r["candidate_id"] == gold)

    # The feature values are those the served model computes for the same prefix.
    picked = list(prefixes.values())[:: max(1, len(prefixes) // N_CHECKED)][:N_CHECKED]
    with make_client() as client:
        for group in picked:
            q = logged[group[0]["line"] - 1]
            body = {"clue": group[0]["prefix"], "metadata": q["metadata"], "k": k}
            r = client.post("/v1/rank", json={**body, "include_features": True})
            assert r.status_code == 200, r.text
            served = {c["id"]: c["features"] for c in r.json()["candidates"]}
            assert set(served) == {row["candidate_id"] for row in group}
            for row in group:
                for name in names:
                    assert row[name] == pytest.approx(served[row["candidate_id"]][name], abs=1e-12)

    # CSV holds the same table.
    table = tmp_path / "table.csv"
    res = run("features", "export", "--index", index_dir, "--log", demo["train"],
              "--model", model_path, "--out", table)  # fmt: skip
    assert res.returncode == 0, res.stderr
    with open(table, newline="", encoding="utf-8") as fh:
        from_csv = list(csv.DictReader(fh))
    assert len(from_csv) == len(rows)
    for a, b in zip(from_csv[:200], rows, strict=False):
        assert a["candidate_id"] == b["candidate_id"]
        assert [float(a[n]) for n in names] == [b[n] for n in names]


def test_export_refuses_an_unknown_output_format(index_dir: Path, tmp_path: Path) -> None:
    log = tmp_path / "log.jsonl"
    log.write_text('{"clue": "a mountain", "answer": null}\n')
    res = run("features", "export", "--index", index_dir, "--log", log, "--out", tmp_path / "t.xls")
    assert res.returncode == 2
    assert "t.xls: cannot tell the format from the name" in res.stderr


@pytest.mark.slow
def test_export_to_parquet_holds_the_same_rows(
    demo: dict[str, Path], index_dir: Path, model_path: Path, tmp_path: Path
) -> None:
    pq = pytest.importorskip("pyarrow.parquet")
    args = ["--index", index_dir, "--log", demo["test"], "--model", model_path]
    assert run("features", "export", *args, "--out", tmp_path / "t.jsonl").returncode == 0
    res = run("features", "export", *args, "--out", tmp_path / "t.parquet")
    assert res.returncode == 0, res.stderr
    assert pq.read_table(tmp_path / "t.parquet").to_pylist() == read_jsonl(tmp_path / "t.jsonl")
