"""The index and search commands, run as the real console script and through api.cli.main."""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest

from api.cli import main
from retriever import build_index, load_index
from retriever.vectors import MAX_EPOCHS
from tests.retriever.helpers import write_jsonl

EXE = shutil.which("hunchwise")


def run(*args: str) -> subprocess.CompletedProcess[str]:
    """Run the installed `hunchwise` script."""
    assert EXE is not None, "the hunchwise console script is not installed (pip install -e .)"
    return subprocess.run([EXE, *args], capture_output=True, text=True, timeout=120)


@pytest.mark.slow
def test_build_info_search_add_remove(tmp_path: Path, small_records: list[dict[str, Any]]) -> None:
    corpus = write_jsonl(tmp_path / "c.jsonl", small_records)
    out = tmp_path / "idx"
    res = run("index", "build", str(corpus), "--out", str(out), "--title-weight", "0.5")
    assert res.returncode == 0, res.stderr
    summary = res.stdout.strip()
    assert "5 articles" in summary and "terms" in summary and "1 unresolved links" in summary
    assert " s, " in summary and "on disk" in summary
    info = run("index", "info", str(out), "--json")
    assert json.loads(info.stdout)["bm25"]["title_weight"] == 0.5
    text = run("index", "info", str(out)).stdout
    assert "articles" in text and "query kernel" in text
    hits = json.loads(
        run("search", str(out), "reed baskets from the marsh", "-k", "2", "--json").stdout
    )
    assert len(hits) == 2 and hits[0]["id"] == "m5" and hits[0]["rank"] == 1
    table = run("search", str(out), "reed basket")
    assert table.returncode == 0 and "Reed basket" in table.stdout
    none = run("search", str(out), "zzzz qqqq")
    assert none.returncode == 0 and "no candidates" in none.stdout
    more = write_jsonl(
        tmp_path / "more.jsonl", [{"id": "m6", "title": "Heron", "text": "A tall bird."}]
    )
    added = run("index", "add", str(out), str(more), "--json")
    assert added.returncode == 0 and json.loads(added.stdout)["articles"] == 6
    removed = run("index", "remove", str(out), "m6", "m1")
    assert removed.returncode == 0 and "4 articles" in removed.stdout
    assert sorted(load_index(out).ids) == ["m2", "m3", "m4", "m5"]


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (["search", "{missing}", "x"], "no such index folder"),
        (["index", "info", "{empty}"], "not a hunchwise index"),
        (["index", "build", "{bad}", "--out", "{out}"], "line 2"),
        (["index", "remove", "{out}", "nope"], "unknown article ids"),
        (["search", "{out}", "x", "-k", "0"], "-k must be at least 1"),
        (["search", "{out}", ""], "the clue is empty"),
        (["search", "{out}", "  \t "], "the clue is empty"),
        (["index", "build", "{bad}", "--out", "{bad}"], "is a file, not a folder"),
        (["search", "{bad}", "x"], "is a file, not an index folder"),
        (["index", "info", "{bad}"], "is a file, not an index folder"),
    ],
)
def test_errors_are_one_line_and_non_zero(
    tmp_path: Path, small_records: list[dict[str, Any]], args: list[str], needle: str
) -> None:
    out = tmp_path / "idx"
    build_index(small_records, out)
    (tmp_path / "empty").mkdir()
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"id": "a", "title": "A", "text": "x"}\n{"id": "b", "text": "y"}\n')
    paths = {"missing": tmp_path / "none", "empty": tmp_path / "empty", "bad": bad, "out": out}
    res = run(*[a.format(**{k: str(v) for k, v in paths.items()}) for a in args])
    assert res.returncode != 0
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and needle in lines[0] and "Traceback" not in res.stderr
    assert load_index(out).n_docs == 5


def test_skip_bad_via_main(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bad = tmp_path / "bad.jsonl"
    bad.write_text(
        '{"id": "a", "title": "A", "text": "river song"}\n{broken\n{"id": "b", "title": "B"}\n'
    )
    out = tmp_path / "idx"
    assert main(["index", "build", str(bad), "--out", str(out)]) != 0
    assert "line 2" in capsys.readouterr().err and not out.exists()
    assert main(["index", "build", str(bad), "--out", str(out), "--skip-bad", "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["articles"] == 1 and summary["skipped_lines"] == 2
    assert "line 2" in summary["problems"][0] and "line 3" in summary["problems"][1]
    assert main(["search", str(out), "river song", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)[0]["id"] == "a"


def test_damaged_index_is_reported_by_main(
    tmp_path: Path, small_records: list[dict[str, Any]], capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "idx"
    assert (
        main(
            [
                "index",
                "build",
                str(write_jsonl(tmp_path / "c.jsonl", small_records)),
                "--out",
                str(out),
                "--json",
            ]
        )
        == 0
    )
    capsys.readouterr()
    (out / "body_docs.npy").unlink()
    assert main(["search", str(out), "reed"]) != 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "body_docs.npy is missing" in err[0]


def test_short_csv_row_via_main(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    corpus = tmp_path / "short.csv"
    corpus.write_text("id,title,text,links\na1,Alpha,river song,Beta\na2,Beta\n")
    out = tmp_path / "idx"
    assert main(["index", "build", str(corpus), "--out", str(out)]) != 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"{corpus}, line 3: " in err[0] and "'text', 'links'" in err[0]
    assert main(["index", "build", str(corpus), "--out", str(out), "--skip-bad"]) == 0
    text = capsys.readouterr().out
    assert "skipped 1 bad lines" in text and "line 3: " in text and "'text'" in text


def test_search_says_why_a_clue_finds_nothing(
    tmp_path: Path, small_records: list[dict[str, Any]], capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "idx"
    build_index(small_records, out)
    assert main(["search", str(out), "the of and which"]) == 0
    text = capsys.readouterr().out
    assert "only stop words" in text and "none of the clue's words" not in text
    assert main(["search", str(out), "?! -- ..."]) == 0
    text = capsys.readouterr().out
    assert "no searchable words" in text and "none of the clue's words" not in text
    assert main(["search", str(out), "zzzz qqqq"]) == 0
    assert "none of the clue's words is in the index" in capsys.readouterr().out


def test_unresolved_links_are_named_not_only_counted(
    tmp_path: Path, small_records: list[dict[str, Any]], capsys: pytest.CaptureFixture[str]
) -> None:
    records = [*small_records, {"id": "z9", "title": "Zell", "text": "x", "links": ["Nowhere"]}]
    corpus = write_jsonl(tmp_path / "c.jsonl", records)
    out = tmp_path / "idx"
    assert main(["index", "build", str(corpus), "--out", str(out), "--no-vectors"]) == 0
    text = capsys.readouterr().out
    assert "links naming no article: " in text and "z9 -> 'Nowhere'" in text
    assert f"hunchwise index info {out} --unresolved" in text
    assert main(["index", "info", str(out), "--unresolved", "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)
    assert {"from": "z9", "link": "Nowhere"} in listed
    assert len(listed) == load_index(out).manifest["build"]["unresolved_links"]


@pytest.mark.parametrize("layout", ["one line", "pretty-printed"])
def test_a_json_array_corpus_is_named_as_such(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], layout: str
) -> None:
    records = [{"id": "a1", "title": "Alpha", "text": "river song"}]
    corpus = tmp_path / "articles.json"
    corpus.write_text(json.dumps(records, indent=2 if layout == "pretty-printed" else None))
    out = tmp_path / "idx"
    assert main(["index", "build", str(corpus), "--out", str(out), "--no-vectors"]) != 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"{corpus}, line 1: " in err[0]
    assert "JSON array" in err[0] and "one JSON object per line" in err[0]
    assert not out.exists()
    # The library's own reader says the same, once, not once per line of the array.
    from retriever import CorpusError, ReadReport, read_articles

    with pytest.raises(CorpusError, match="line 1: this is a JSON array"):
        list(read_articles(corpus))
    report = ReadReport()
    assert list(read_articles(corpus, skip_bad=True, report=report)) == []
    assert report.skipped == 1


def test_build_takes_the_vector_epochs(tmp_path: Path, small_records: list[dict[str, Any]]) -> None:
    corpus = write_jsonl(tmp_path / "c.jsonl", small_records)
    common = ["--vector-dim", "8", "--vector-threads", "1", "--json"]
    assert main(["index", "build", str(corpus), "--out", str(tmp_path / "a"), *common]) == 0
    # The default follows the corpus's size: a corpus of a few words gets the most epochs.
    assert load_index(tmp_path / "a").manifest["vectors"]["settings"]["epochs"] == MAX_EPOCHS
    argv = ["index", "build", str(corpus), "--out", str(tmp_path / "b"), "--vector-epochs", "3"]
    assert main([*argv, *common]) == 0
    assert load_index(tmp_path / "b").manifest["vectors"]["settings"]["epochs"] == 3
