"""`hunchwise rank --filter/--snippet` and `hunchwise search --filter`: the real console script."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from retriever import build_index, load_index
from retriever.snippets import MAX_CHARS
from tests.api.conftest import demo, index_dir, make_client, model_path, test_questions
from tests.cli.test_rank import DemoService, clue_file, demo_service, run

__all__ = [  # fixtures
    "demo",
    "demo_service",
    "index_dir",
    "make_client",
    "model_path",
    "test_questions",
]

SPEC = {"kind": {"in": ["town", "river", "island", "mountain"]}}


@pytest.mark.slow
def test_rank_with_a_filter_gives_the_services_probabilities(
    demo_service: DemoService, tmp_path: Path
) -> None:
    qs = demo_service.questions[:5]
    out = tmp_path / "ranked.jsonl"
    res = run("rank", "--index", demo_service.index, "--model", demo_service.model,
              "--input", clue_file(tmp_path, qs, "id", "clue"), "--output", out,
              "--filter", json.dumps(SPEC), "--snippet")  # fmt: skip
    assert res.returncode == 0, res.stderr
    ranked = [json.loads(line) for line in out.read_text().splitlines()]
    idx = load_index(demo_service.index)
    with demo_service.client() as client:
        for q, mine in zip(qs, ranked, strict=True):
            body = {"clue": q["clue"], "filter": SPEC, "snippet": True}
            served = client.post("/v1/rank", json=body).json()
            assert mine["filter"] == served["filter"] == SPEC
            assert [c["id"] for c in mine["candidates"]] == [c["id"] for c in served["candidates"]]
            for a, b in zip(mine["candidates"], served["candidates"], strict=True):
                assert a["probability"] == pytest.approx(b["probability"], rel=1e-12)
                assert a["snippet"] == b["snippet"] and len(a["snippet"]) <= MAX_CHARS
                assert idx.document(a["id"]).metadata["kind"] in SPEC["kind"]["in"]
            assert mine["decision"] == served["decision"]


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        ('{"kind": ', "argument --filter: not valid JSON"),
        ('["town"]', "argument --filter: expected a JSON object"),
    ],
)
def test_rank_refuses_a_filter_that_is_not_an_object(
    tmp_path: Path, value: str, expected: str
) -> None:
    res = run("rank", "river town", "--index", tmp_path / "i", "--model", tmp_path / "m.json",
              "--filter", value)  # fmt: skip
    assert res.returncode == 2 and expected in res.stderr, res.stderr


def test_search_filter_and_its_errors(tmp_path: Path, small_records: list[dict[str, Any]]) -> None:
    folder = tmp_path / "idx"
    build_index(small_records, folder, vectors=False)
    res = run("search", folder, "reed marshes river", "--json", "-k", "10")
    assert {h["id"] for h in json.loads(res.stdout)} > {"m4"}
    res = run("search", folder, "reed marshes river", "--json", "-k", "10",
              "--filter", '{"kind": "place"}')  # fmt: skip
    assert res.returncode == 0, res.stderr
    assert [h["id"] for h in json.loads(res.stdout)] == ["m4"]  # the only article of that kind
    res = run("search", folder, "reed", "--filter", '{"colour": "red"}')
    assert res.returncode != 0
    assert "filter field 'colour'" in res.stderr and res.stderr.count("\n") == 1, res.stderr
    res = run("search", folder, "reed", "--filter", '{"kind": 3}')
    assert (
        res.returncode != 0
        and "filter field 'kind'" in res.stderr
        and "needs a string" in res.stderr
    )
