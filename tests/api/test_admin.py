"""Admin endpoints: bearer-token auth, entries add/replace/delete, model reload (in process)."""

from __future__ import annotations

import json
import shutil
import weakref
from pathlib import Path
from typing import Any

import pytest

from retriever import load_index
from tests.api.svc_helpers import ADMIN_TOKEN, admin_headers

ADMIN_CALLS: list[tuple[str, str, Any]] = [
    ("post", "/v1/admin/reload", None),
    ("post", "/v1/admin/entries", []),
    ("delete", "/v1/admin/entries/a000001", None),
]
NEW = {
    "id": "zz-new-1",
    "title": "Quorvantle (lighthouse)",
    "text": "The lighthouse Quorvantle stands on the cliff of Mirrowdeep above the grey shoals.",
    "links": [],
    "aliases": ["Quorvantle Light"],
    "popularity": 3.0,
    "metadata": {"kind": "lighthouse"},
}


def _call(client: Any, method: str, path: str, body: Any, headers: dict[str, str]) -> Any:
    if method == "post":
        return client.post(path, json=body, headers=headers)
    return client.delete(path, headers=headers)


@pytest.mark.parametrize(("method", "path", "body"), ADMIN_CALLS)
def test_admin_refuses_missing_or_wrong_tokens(
    client: Any, method: str, path: str, body: Any
) -> None:
    # RFC 6750 (bearer tokens), section 3: a missing or wrong token is 401 with
    # WWW-Authenticate: Bearer; RFC 9110 15.5.4: 403 when the server refuses anyway.
    r = _call(client, method, path, body, {})
    assert r.status_code == 401 and "missing admin token" in r.json()["detail"]
    assert r.headers["www-authenticate"] == "Bearer"
    for bad in (
        "Bearer wrong-token",
        f"Bearer {ADMIN_TOKEN}x",
        f"Basic {ADMIN_TOKEN}",
        f"Bearer {ADMIN_TOKEN[:-1]}",
        "Bearer",
        f"bearer{ADMIN_TOKEN}",
    ):
        r = _call(client, method, path, body, {"Authorization": bad})
        assert r.status_code == 401, (bad, r.text)


@pytest.mark.parametrize(("method", "path", "body"), ADMIN_CALLS)
def test_admin_is_disabled_without_a_token(
    make_client: Any, method: str, path: str, body: Any
) -> None:
    with make_client(admin_token=None) as c:
        r = _call(c, method, path, body, admin_headers())
        assert r.status_code == 403 and "disabled" in r.json()["detail"]
        assert c.get("/v1/info").json()["admin_enabled"] is False


def test_token_from_file(make_client: Any, tmp_path: Path) -> None:
    token_file = tmp_path / "token"
    token_file.write_text("file-token-abcdef\n")
    with make_client(admin_token=None, admin_token_file=token_file) as c:
        assert (
            c.post("/v1/admin/reload", headers=admin_headers("file-token-abcdef")).status_code
            == 200
        )
        assert c.post("/v1/admin/reload", headers=admin_headers()).status_code == 401


def test_add_replace_and_delete_entries(make_client: Any, own_index: Path) -> None:
    with make_client(index_dir=own_index) as c:
        before = c.get("/v1/info").json()
        r = c.post("/v1/admin/entries", json=[NEW], headers=admin_headers())
        assert r.status_code == 200, r.text
        change = r.json()
        assert change["articles"] == before["articles"] + 1
        assert change["previous_index_version"] == before["index_version"]
        assert change["index_version"] != before["index_version"]
        assert c.get("/v1/entries/zz-new-1").json()["title"] == NEW["title"]
        top = c.post("/v1/rank", json={"clue": "Quorvantle lighthouse Mirrowdeep"}).json()
        assert top["candidates"][0]["id"] == "zz-new-1"
        assert top["index_version"] == change["index_version"]
        # Same id again: replaced, not added.
        replaced = {**NEW, "text": "A tall tower on the dunes of Hesselmark, lit each dusk."}
        r = c.post("/v1/admin/entries", json=[replaced], headers=admin_headers())
        assert r.json()["articles"] == before["articles"] + 1
        assert c.get("/v1/entries/zz-new-1").json()["text"] == replaced["text"]
        r = c.delete("/v1/admin/entries/zz-new-1", headers=admin_headers())
        assert r.status_code == 200 and r.json()["articles"] == before["articles"]
        assert c.get("/v1/entries/zz-new-1").status_code == 404
        r = c.delete("/v1/admin/entries/zz-new-1", headers=admin_headers())
        assert r.status_code == 404 and "zz-new-1" in r.json()["detail"]
    # The change is on disk, not only in memory.
    assert load_index(own_index).n_docs == before["articles"]


@pytest.mark.parametrize(
    ("articles", "field"),
    [
        ([{**NEW, "title": ""}], "body.0.title"),
        ([{**NEW, "id": "  "}], "body.0.id"),
        ([{k: v for k, v in NEW.items() if k != "text"}], "body.0.text"),
        ([{**NEW, "links": "x"}], "body.0.links"),
        ([{**NEW, "popularity": -2}], "body.0.popularity"),
        ([{**NEW, "metadata": []}], "body.0.metadata"),
        ([{**NEW, "colour": "red"}], "body.0.colour"),
        ([NEW, {**NEW, "id": "zz-new-2"}], "body.1.title"),  # duplicate title within the call
        ([NEW, NEW], "body.1.id"),  # duplicate id within the call
        ([], "body"),
    ],
)
def test_bad_articles_are_rejected_naming_the_field(
    make_client: Any, own_index: Path, articles: list[dict[str, Any]], field: str
) -> None:
    with make_client(index_dir=own_index) as c:
        version = c.get("/v1/info").json()["index_version"]
        r = c.post("/v1/admin/entries", json=articles, headers=admin_headers())
        assert r.status_code == 422, r.text
        locs = [".".join(map(str, e["loc"])) for e in r.json()["detail"]]
        assert field in locs, r.json()
        assert c.get("/v1/info").json()["index_version"] == version
    assert load_index(own_index).version == version


def test_title_taken_by_another_article_is_422(make_client: Any, own_index: Path) -> None:
    taken = load_index(own_index).titles[0]
    with make_client(index_dir=own_index) as c:
        r = c.post("/v1/admin/entries", json=[{**NEW, "title": taken}], headers=admin_headers())
        assert r.status_code == 422 and taken in json.dumps(r.json())


def test_reload_swaps_the_model_and_a_bad_file_keeps_the_old_one(
    make_client: Any,
    model_path: Path,
    other_model_path: Path,
    tmp_path: Path,
    test_questions: list[dict[str, Any]],
) -> None:
    served = tmp_path / "served-model.json"
    shutil.copy(model_path, served)
    clue = test_questions[0]["clue"]
    with make_client(model_path=served) as c:
        old = c.get("/v1/info").json()["model_version"]
        for broken in ("{ not json", json.dumps({"format": "something-else"}), ""):
            served.write_text(broken)
            r = c.post("/v1/admin/reload", headers=admin_headers())
            assert r.status_code == 409, r.text
            assert "still serving" in r.json()["detail"] and old in r.json()["detail"]
            assert c.post("/v1/rank", json={"clue": clue}).json()["model_version"] == old
        served.unlink()
        assert c.post("/v1/admin/reload", headers=admin_headers()).status_code == 409
        shutil.copy(other_model_path, served)
        before = c.app.state.runtime.serving.current
        old_index, old_model = weakref.ref(before.index), weakref.ref(before.model)
        del before
        r = c.post("/v1/admin/reload", headers=admin_headers())
        assert r.status_code == 200, r.text
        # The old pair is gone once swapped out (the server freezes the GC generations, so
        # only reference counting can free it; a leak would keep one index per reload).
        assert old_index() is None and old_model() is None
        new = r.json()["model_version"]
        assert r.json()["previous_model_version"] == old and new != old
        body = c.post("/v1/rank", json={"clue": clue}).json()
        assert body["model_version"] == new
        assert c.get("/v1/info").json()["generation"] == r.json()["generation"]
