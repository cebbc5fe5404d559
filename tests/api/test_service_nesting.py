"""Deeply nested JSON bodies get a 4xx with a short message from a real 2-worker server."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from api.schemas import MAX_METADATA_DEPTH
from tests.api.svc_helpers import ADMIN_TOKEN, Server, admin_headers, serve

pytestmark = [pytest.mark.slow, pytest.mark.server]

PATHS = ["/v1/rank", "/v1/rank/batch", "/v1/feedback", "/v1/admin/entries"]


def _nested_arrays(depth: int, closed: bool) -> bytes:
    return b"[" * depth + (b"]" * depth if closed else b"")


def _nested_objects(depth: int) -> bytes:
    return b'{"a":' * depth + b"1" + b"}" * depth


# Depths on both sides of what Python's JSON parser reads (it recurses once per level, so
# about 1000 levels): the deep ones fail to parse, the shallower ones parse and then fail
# validation, whose error used to echo the input through recursive helpers.
BODIES = {
    "arrays-100000-unclosed": _nested_arrays(100_000, closed=False),
    "arrays-100000": _nested_arrays(100_000, closed=True),
    "objects-50000": _nested_objects(50_000),
    "arrays-600": _nested_arrays(600, closed=True),
    "objects-600": _nested_objects(600),
    "arrays-300": _nested_arrays(300, closed=True),
}


@pytest.fixture(scope="module")
def server(index_dir: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    """One 2-worker server for the whole module (no model: parsing comes before ranking).

    It serves a copy of the index: admin calls change the index they serve.
    """
    work = tmp_path_factory.mktemp("nesting")
    own_index = work / "idx"
    shutil.copytree(index_dir, own_index)
    token = work / "admin-token"
    token.write_text(ADMIN_TOKEN, encoding="utf-8")
    args = ["--index", str(own_index), "--admin-token-file", str(token)]
    with serve(args, work, workers=2) as s:
        yield s


@pytest.mark.parametrize("path", PATHS)
@pytest.mark.parametrize("name", list(BODIES))
def test_deep_nesting_is_4xx_without_echo(server: Server, path: str, name: str) -> None:
    body = BODIES[name]
    with httpx.Client(base_url=server.url, timeout=60) as c:
        headers = {"Content-Type": "application/json", **admin_headers()}
        r = c.post(path, content=body, headers=headers)
        assert r.status_code in (400, 422), (r.status_code, r.text[:300])
        detail = r.json()["detail"]
        assert detail
        # A short message, not the input sent back (the body is 600 to 300,000 bytes).
        assert len(r.content) < 2000, r.text[:300]
        if r.status_code == 400:
            assert "too deeply" in detail
        # The worker that answered is still serving.
        assert c.get("/readyz").status_code == 200


def test_deep_metadata_is_refused_naming_the_field(server: Server) -> None:
    depth = MAX_METADATA_DEPTH + 1
    metadata = b'{"a":' * depth + b"1" + b"}" * depth
    with httpx.Client(base_url=server.url, timeout=60) as c:
        r = c.post(
            "/v1/rank",
            content=b'{"clue": "river", "metadata": ' + metadata + b"}",
            headers={"Content-Type": "application/json"},
        )
        assert r.status_code == 422, r.text[:300]
        [error] = r.json()["detail"]
        assert error["loc"] == ["body", "metadata"]
        assert f"{MAX_METADATA_DEPTH} levels" in error["msg"]
        ok = b'{"a":' * (depth - 1) + b"1" + b"}" * (depth - 1)
        r = c.post(
            "/v1/rank",
            content=b'{"clue": "river", "metadata": ' + ok + b"}",
            headers={"Content-Type": "application/json"},
        )
        assert r.status_code == 200, r.text[:300]


def test_small_bad_input_is_still_echoed(server: Server) -> None:
    with httpx.Client(base_url=server.url, timeout=60) as c:
        r = c.post(
            "/v1/rank",
            content=b'{"clue": "river", "metadata": {"w": [1, NaN]}}',
            headers={"Content-Type": "application/json"},
        )
        assert r.status_code == 422, r.text
        [error] = r.json()["detail"]
        assert error["input"] == {"w": [1, "nan"]}
