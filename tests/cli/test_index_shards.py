"""`hunchwise index build --shards` and `hunchwise search` on the sharded folder (no Ray: the
same build runs in the command's own process)."""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest

from retriever import IndexFormatError, build_index, update_index
from tests.retriever.helpers import write_jsonl

EXE = shutil.which("hunchwise")


def run(*args: str) -> subprocess.CompletedProcess[str]:
    """Run the installed `hunchwise` script."""
    assert EXE is not None, "the hunchwise console script is not installed (pip install -e .)"
    return subprocess.run([EXE, *args], capture_output=True, text=True, timeout=120)


@pytest.mark.slow
def test_build_shards_then_search_as_one_index(
    tmp_path: Path, small_records: list[dict[str, Any]]
) -> None:
    corpus = write_jsonl(tmp_path / "c.jsonl", small_records)
    single = build_index(corpus, tmp_path / "single", vectors=False)
    out = tmp_path / "sharded"
    res = run("index", "build", str(corpus), "--out", str(out), "--shards", "2", "--json")
    assert res.returncode == 0, res.stderr
    summary = json.loads(res.stdout)
    assert summary["articles"] == 5 and summary["shards"] == [2, 3]
    for clue in ("reed baskets from the marsh", "Quillfen river", "estuary ferries"):
        got = json.loads(run("search", str(out), clue, "-k", "4", "--json").stdout)
        want = [
            {"rank": h.rank, "id": h.doc_id, "title": h.title, "score": h.score}
            for h in single.search(clue, k=4)
        ]
        assert got == want and got
    refused = run("index", "add", str(out), str(corpus))
    assert refused.returncode != 0 and "built in 2 shards" in refused.stderr


def test_one_shard_cannot_be_updated_alone(
    tmp_path: Path, small_records: list[dict[str, Any]]
) -> None:
    """Its weights use the whole corpus's statistics; an update would recount them locally."""
    from retriever.shards import build_sharded

    corpus = write_jsonl(tmp_path / "c.jsonl", small_records)
    out = build_sharded(corpus, tmp_path / "sharded", shards=2)
    with pytest.raises(IndexFormatError, match="one shard of"):
        update_index(out / "shard-000", remove=["m1"])


def test_copy_vectors_refuses_plainly_what_it_cannot_copy(
    tmp_path: Path, small_records: list[dict[str, Any]]
) -> None:
    """A generation the source lacks, a sharded source: one line naming the folder."""
    from retriever.shards import build_sharded

    corpus = write_jsonl(tmp_path / "c.jsonl", small_records)
    single = build_index(corpus, tmp_path / "single", vectors=False)
    out = build_sharded(corpus, tmp_path / "sharded", shards=2, vectors=False)
    missing = run("index", "copy-vectors", str(single.path), str(out), "--generation", "0" * 16)
    assert missing.returncode != 0 and "Traceback" not in missing.stderr
    assert f"{single.path}: has no vector generation '{'0' * 16}'" in missing.stderr
    assert "(it has: none)" in missing.stderr
    sharded_source = run("index", "copy-vectors", str(out), str(out))
    assert sharded_source.returncode != 0 and "Traceback" not in sharded_source.stderr
    assert f"{out} is a sharded index" in sharded_source.stderr
    nothing = run("index", "copy-vectors", str(single.path), str(out), "--json")
    assert nothing.returncode == 0, nothing.stderr
    assert json.loads(nothing.stdout)["generations"] == []


@pytest.mark.slow
def test_search_with_a_filter_on_a_sharded_folder_equals_the_single_index(
    tmp_path: Path,
) -> None:
    """The filter is typed over the whole corpus (as one index types it), not per shard."""
    from corpus_demo.pipeline import generate_corpus
    from retriever.shards import build_sharded

    generate_corpus(tmp_path, n_articles=300, n_questions=10, seed=3, progress=False)
    corpus = tmp_path / "articles.jsonl"
    single = build_index(corpus, tmp_path / "single", vectors=False).path
    sharded = build_sharded(corpus, tmp_path / "sharded", shards=3, vectors=False)
    specs = [{"category": {"in": ["place", "person"]}}, {"category": "work"}]
    for spec in specs:
        for clue in ("river town", "a painter of the north", "old stone bridge"):
            args = [clue, "-k", "8", "--json", "--filter", json.dumps(spec)]
            want = run("search", str(single), *args)
            got = run("search", str(sharded), *args)
            assert want.returncode == 0, want.stderr
            assert got.returncode == 0, got.stderr
            assert json.loads(got.stdout) == json.loads(want.stdout), (spec, clue)
    # The filter acted: fewer or other hits than without it for some clue.
    plain = json.loads(run("search", str(sharded), "river town", "-k", "8", "--json").stdout)
    only = run("search", str(sharded), "river town", "-k", "8", "--json",
               "--filter", json.dumps(specs[1]))  # fmt: skip
    assert plain != json.loads(only.stdout)


def _info_rows(text: str) -> dict[str, str]:
    """The `field  value` rows of `index info`'s first table."""
    rows = {}
    for line in text.split("\n\n")[0].splitlines()[2:]:
        field, _, value = line.partition("  ")
        rows[field.strip()] = value.strip()
    return rows


def test_index_info_on_a_sharded_folder_gives_the_single_index_s_figures(
    tmp_path: Path, small_records: list[dict[str, Any]]
) -> None:
    from retriever.shards import build_sharded

    corpus = write_jsonl(tmp_path / "c.jsonl", small_records)
    single = build_index(corpus, tmp_path / "single", vectors=False)
    out = build_sharded(corpus, tmp_path / "sharded", shards=2, vectors=False)
    res = run("index", "info", str(out))
    assert res.returncode == 0, res.stderr
    one, many = _info_rows(run("index", "info", str(single.path)).stdout), _info_rows(res.stdout)
    for field in ("articles", "terms", "postings", "mean length", "qualified titles", "bm25"):
        assert many[field] == one[field], field
    assert many["unresolved links"] == one["unresolved links"]
    assert many["shards"] == "2"
    # One row per shard, its rows and articles as the top manifest lists them.
    shard_rows = res.stdout.split("\n\n")[1].splitlines()[2:]
    assert [r.split()[:3] for r in shard_rows] == [["shard-000", "0", "2"], ["shard-001", "2", "3"]]
    as_json = json.loads(run("index", "info", str(out), "--json").stdout)
    assert as_json["articles"] == 5 and len(as_json["shard_manifests"]) == 2
    links = json.loads(run("index", "info", str(out), "--unresolved", "--json").stdout)
    single_links = run("index", "info", str(single.path), "--unresolved", "--json").stdout
    assert sorted(map(str, links)) == sorted(map(str, json.loads(single_links)))
