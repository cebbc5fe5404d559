"""POST /v1/rank with a metadata filter and with snippets (TestClient on the real app)."""

from __future__ import annotations

import contextlib
import shutil
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from reranker import load_model, rank_clue, rank_clues
from reranker.servedrecords import parse_served
from retriever import load_index
from retriever.snippets import ELLIPSIS, MAX_CHARS
from tests.api.svc_helpers import ADMIN_TOKEN, TestClient, admin_headers, read_jsonl, serve

Factory = Callable[..., contextlib.AbstractContextManager[TestClient]]


def _kinds(index_dir: Path) -> tuple[list[str], str]:
    """Each row's kind, and the rarest kind of the demo corpus."""
    idx = load_index(index_dir)
    kinds = [idx.document_at(r).metadata["kind"] for r in range(idx.n_docs)]
    return kinds, min(Counter(kinds).items(), key=lambda kv: (kv[1], kv[0]))[0]


def test_a_filter_and_snippets_reach_every_thread_of_a_batch(
    index_dir: Path, model_path: Path, test_questions: list[dict[str, Any]]
) -> None:
    idx, model = load_index(index_dir), load_model(model_path)
    clues = [q["clue"] for q in test_questions[:24]]
    where = {"kind": {"in": ["song", "river", "town"]}}
    one = rank_clues(idx, model, clues, k=5, where=where, snippets=True, threads=1)
    two = rank_clues(idx, model, clues, k=5, where=where, snippets=True, threads=2)
    assert two == one
    assert all(c.snippet for r in one for c in r.candidates)
    kinds = {idx.ids[r]: idx.document_at(r).metadata["kind"] for r in range(idx.n_docs)}
    assert {kinds[c.doc_id] for r in two for c in r.candidates} <= {"song", "river", "town"}


def test_filtered_candidates_equal_an_exhaustive_search_and_k_above_the_matches(
    make_client: Factory, index_dir: Path
) -> None:
    kinds, rare = _kinds(index_dir)
    idx = load_index(index_dir)
    clue = "a town on the river with a harbour and a song about the sea"
    tokens = idx.analyzer.tokens(clue)
    scores = idx.score_tokens(tokens)
    allowed = np.array([k == rare for k in kinds])
    matching = np.flatnonzero(allowed & (scores != 0))
    ref = matching[np.lexsort((matching, -scores[matching]))][:50]
    assert 0 < ref.size < 50  # k=50 asks for more than the filter keeps
    with make_client(model_path=None, max_k=50) as c:
        body = {"clue": clue, "k": 50, "filter": {"kind": rare}, "include_features": True}
        r = c.post("/v1/rank", json=body)
        assert r.status_code == 200, r.text
        got = r.json()
    cands = got["candidates"]
    assert [c["id"] for c in cands] == [idx.ids[int(row)] for row in ref]
    assert all(c["score"] > 0 for c in cands)  # no filtered-out article padded with 0
    assert got["filter"] == {"kind": rare}
    # Rival-relative features see the filtered set alone: ranks 1..n, softmax sums to 1.
    assert [c["features"]["bm25_rank"] for c in cands] == list(range(1, len(cands) + 1))
    assert sum(c["features"]["score_softmax"] for c in cands) == pytest.approx(1.0)
    assert cands[0]["features"]["score_ratio_to_top"] == pytest.approx(1.0)


def test_filter_with_a_model_matches_the_library_and_is_logged(
    make_client: Factory,
    index_dir: Path,
    model_path: Path,
    test_questions: list[dict[str, Any]],
    tmp_path: Path,
) -> None:
    kinds, _ = _kinds(index_dir)
    idx = load_index(index_dir)
    model = load_model(model_path, index=idx)
    spec = {"kind": {"in": ["town", "river", "island"]}}
    clues = [q["clue"] for q in test_questions[:4]]
    with make_client() as c:
        plain = c.post("/v1/rank", json={"clue": clues[0]}).json()
        for clue in clues:
            got = c.post("/v1/rank", json={"clue": clue, "filter": spec}).json()
            mine = rank_clue(idx, model, clue, where=spec)
            assert [x["id"] for x in got["candidates"]] == [x.doc_id for x in mine.candidates]
            assert [x["probability"] for x in got["candidates"]] == pytest.approx(
                [x.probability for x in mine.candidates], rel=1e-12
            )
            assert all(kinds[idx.row_of(x["id"])] in spec["kind"]["in"] for x in got["candidates"])
            total = sum(x["probability"] for x in got["candidates"]) + got["none_of_these"]
            assert total == pytest.approx(1.0)
        batch = c.post("/v1/rank/batch", json={"clues": clues[:2], "filter": spec}).json()
        assert batch["filter"] == spec
        for res in batch["results"]:
            assert all(kinds[idx.row_of(x["id"])] in spec["kind"]["in"] for x in res["candidates"])
    assert plain["filter"] is None
    served = [x for x in read_jsonl(tmp_path / "log" / "served.jsonl") if x["kind"] == "served"]
    assert "filter" not in served[0]  # an unfiltered request's line is as before
    assert [x["filter"] for x in served[1:]] == [spec] * (len(clues) + 2)
    where = {"file": "served.jsonl", "line": 2}
    assert parse_served(served[1], where).where == spec
    assert parse_served(served[0], where).where is None  # older lines read back without it


@pytest.mark.parametrize(
    ("spec", "field", "words"),
    [
        ({"colour": "red"}, "colour", "no article has this metadata field"),
        ({"kind": 5}, "kind", "needs a string"),
        ({"kind": {"between": [1, 2]}}, "kind", "unknown operator"),
        ({"kind": {"gte": 3}}, "kind", "compares numbers"),
    ],
)
def test_a_bad_filter_is_a_422_naming_the_field(
    client: TestClient, spec: dict[str, Any], field: str, words: str
) -> None:
    for path, body in (
        ("/v1/rank", {"clue": "river town", "filter": spec}),
        ("/v1/rank/batch", {"clues": ["river town"], "filter": spec}),
    ):
        r = client.post(path, json=body)
        assert r.status_code == 422, r.text
        (err,) = r.json()["detail"]
        assert err["loc"] == ["body", "filter", field]
        assert field in err["msg"] and words in err["msg"]
    r = client.post("/v1/rank", json={"clue": "river town", "filter": ["kind"]})
    assert r.status_code == 422 and r.json()["detail"][0]["loc"][:2] == ["body", "filter"]


def test_snippets_only_when_asked_hold_matched_words_and_are_bounded(
    client: TestClient, index_dir: Path, test_questions: list[dict[str, Any]]
) -> None:
    idx = load_index(index_dir)
    clue = test_questions[0]["clue"]
    terms = set(idx.analyzer.tokens(clue))
    plain = client.post("/v1/rank", json={"clue": clue}).json()
    assert all(c["snippet"] is None for c in plain["candidates"])
    got = client.post("/v1/rank", json={"clue": clue, "snippet": True}).json()
    assert [c["id"] for c in got["candidates"]] == [c["id"] for c in plain["candidates"]]
    for c in got["candidates"]:
        text, snip = idx.document(c["id"]).text, c["snippet"]
        assert len(snip) <= MAX_CHARS
        assert snip.removeprefix(ELLIPSIS).removesuffix(ELLIPSIS) in text
        if terms & set(idx.analyzer.tokens(text)):  # its text holds a term of the clue
            assert terms & set(idx.analyzer.tokens(snip))


@pytest.mark.slow
@pytest.mark.server
def test_live_server_filters_and_admin_entry_calls_keep_the_columns_in_step(
    index_dir: Path, tmp_path: Path
) -> None:
    # A real `hunchwise serve` on loopback: an article of a new kind added through the admin
    # call is found by a filter on that kind at once, and gone once removed.
    folder = tmp_path / "idx"
    shutil.copytree(index_dir, folder)
    env = {"HUNCHWISE_ADMIN_TOKEN": ADMIN_TOKEN}
    new = {
        "id": "zz1",
        "title": "Glimmerpond",
        "text": "Glimmerpond is a still lake of the north where herons wade among the reeds.",
        "metadata": {"kind": "lake"},
    }
    body = {"clue": "a still lake where herons wade", "k": 5, "filter": {"kind": "lake"}}
    with (
        serve(["--index", str(folder)], tmp_path, env=env) as server,
        httpx.Client(base_url=server.url, timeout=60) as c,
    ):
        r = c.post("/v1/rank", json=body)  # no lake yet: no candidate, and no error
        assert r.status_code == 200 and r.json()["candidates"] == [], r.text
        r = c.post("/v1/rank", json={**body, "filter": {"kind": 1}})
        assert r.status_code == 422 and r.json()["detail"][0]["loc"] == ["body", "filter", "kind"]
        r = c.post("/v1/rank", json={**body, "filter": {"kind": "town"}, "snippet": True})
        assert r.status_code == 200, r.text
        assert all(len(x["snippet"]) <= MAX_CHARS for x in r.json()["candidates"])
        added = c.post("/v1/admin/entries", json=[new], headers=admin_headers())
        assert added.status_code == 200, added.text
        r = c.post("/v1/rank", json=body)
        assert r.status_code == 200, r.text
        assert [x["id"] for x in r.json()["candidates"]] == ["zz1"]  # k=5: one match only
        assert c.delete("/v1/admin/entries/zz1", headers=admin_headers()).status_code == 200
        r = c.post("/v1/rank", json={**body, "filter": {"kind": {"in": ["lake", "town"]}}})
        assert r.status_code == 200 and "zz1" not in [x["id"] for x in r.json()["candidates"]]
