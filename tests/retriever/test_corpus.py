"""Reading corpora: the same articles from every format, and clear errors for bad lines."""

from __future__ import annotations

import csv
import gzip
import json
from pathlib import Path
from typing import Any, NamedTuple

import pytest

from retriever import CorpusError, ReadReport, build_index, read_articles, split_title

from .helpers import write_jsonl


def _write_delimited(path: Path, records: list[dict[str, Any]], delimiter: str) -> Path:
    cols = ["id", "title", "text", "links", "aliases", "popularity", "metadata"]
    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, delimiter=delimiter)
        w.writerow(cols)
        for r in records:
            w.writerow(
                [
                    r["id"],
                    r["title"],
                    r["text"],
                    json.dumps(r.get("links", [])),
                    "|".join(r.get("aliases", [])),
                    "" if r.get("popularity") is None else r["popularity"],
                    json.dumps(r["metadata"]) if "metadata" in r else "",
                ]
            )
    return path


def test_all_formats_give_the_same_articles(
    tmp_path: Path, small_records: list[dict[str, Any]]
) -> None:
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    paths = [
        write_jsonl(tmp_path / "c.jsonl", small_records),
        _write_delimited(tmp_path / "c.csv", small_records, ","),
        _write_delimited(tmp_path / "c.tsv", small_records, "\t"),
    ]
    gz = tmp_path / "c.jsonl.gz"
    gz.write_bytes(gzip.compress(paths[0].read_bytes()))
    paths.append(gz)
    rows = [
        {**{"links": [], "aliases": [], "popularity": None, "metadata": None}, **r}
        for r in small_records
    ]
    rows = [{**r, "metadata": json.dumps(r["metadata"]) if r["metadata"] else None} for r in rows]
    pq.write_table(pa.Table.from_pylist(rows), tmp_path / "c.parquet")
    paths.append(tmp_path / "c.parquet")
    expected = list(read_articles(small_records))
    assert len(expected) == 5
    for path in paths:
        assert list(read_articles(path)) == expected, path


@pytest.mark.parametrize(
    ("title", "base", "qualifier"),
    [
        ("Quillfen (river)", "Quillfen", "river"),
        ("Mercury (planet) ", "Mercury", "planet"),
        ("Plain title", "Plain title", ""),
        ("Odd (one) (two)", "Odd (one)", "two"),
        ("(only)", "(only)", ""),
    ],
)
def test_split_title(title: str, base: str, qualifier: str) -> None:
    assert split_title(title) == (base, qualifier)


BAD_LINES = [
    ('{"id": "x", "title": "T", "text": "a"', 2, None, "malformed JSON"),
    ('{"id": "x", "text": "a"}', 2, "title", "required"),
    ('{"id": "a1", "title": "Other", "text": "a"}', 2, "id", "duplicate id"),
    ('{"id": "x", "title": "First", "text": "a"}', 2, "title", "duplicate title"),
    ('{"id": 5, "title": "T", "text": "a"}', 2, "id", "must be a string"),
    ('{"id": "x", "title": "T", "text": "a", "links": "[1, 2]"}', 2, "links", "list of strings"),
    ('{"id": "x", "title": "T", "text": "a", "popularity": -3}', 2, "popularity", ">= 0"),
    ('{"id": "x", "title": "T", "text": "a", "metadata": [1]}', 2, "metadata", "object"),
    ('["not", "an", "object"]', 2, None, "JSON object"),
]


class BadCorpus(NamedTuple):
    """A corpus file whose line 2 is bad, and what its error names."""

    path: Path
    lineno: int
    field: str | None
    reason: str


@pytest.fixture(params=BAD_LINES, ids=[reason for *_, reason in BAD_LINES])
def bad_corpus(request: pytest.FixtureRequest, tmp_path: Path) -> BadCorpus:
    """One good article then one of BAD_LINES (so the bad line is line 2)."""
    line, lineno, field, reason = request.param
    path = tmp_path / "bad.jsonl"
    path.write_text('{"id": "a1", "title": "First", "text": "ok"}\n' + line + "\n")
    return BadCorpus(path, lineno, field, reason)


def test_bad_lines_name_file_line_and_field(bad_corpus: BadCorpus) -> None:
    path, lineno, field, reason = bad_corpus
    with pytest.raises(CorpusError) as err:
        list(read_articles(path))
    msg = str(err.value)
    assert str(path) in msg and f"line {lineno}" in msg and reason in msg
    assert err.value.line == lineno
    if field:
        assert f"field '{field}'" in msg and err.value.field == field


def test_bad_encoding(tmp_path: Path) -> None:
    path = tmp_path / "latin.jsonl"
    path.write_bytes(
        b'{"id": "a", "title": "A", "text": "ok"}\n{"id": "b", "title": "B", "text": "caf\xe9"}\n'
    )
    with pytest.raises(CorpusError, match=r"line 2: not valid UTF-8"):
        list(read_articles(path))
    csv_path = tmp_path / "latin.csv"
    csv_path.write_bytes(b"id,title,text\na,A,ok\nb,B,caf\xe9\n")
    with pytest.raises(CorpusError, match="not valid UTF-8"):
        list(read_articles(csv_path))


def test_skip_bad_reports_how_many_and_which(tmp_path: Path) -> None:
    path = tmp_path / "mixed.jsonl"
    path.write_text(
        '{"id": "a", "title": "A", "text": "ok"}\n'
        "{oops\n"
        '{"id": "a", "title": "B", "text": "dup id"}\n'
        '{"id": "c", "title": "C", "text": ""}\n'
    )
    report = ReadReport()
    arts = list(read_articles(path, skip_bad=True, report=report))
    assert [a.id for a in arts] == ["a", "c"]
    assert report.articles == 2 and report.skipped == 2
    assert "line 2" in report.problems[0] and "line 3" in report.problems[1]


def test_unknown_format_and_missing_file(tmp_path: Path) -> None:
    with pytest.raises(CorpusError, match="file not found"):
        list(read_articles(tmp_path / "none.jsonl"))
    other = tmp_path / "corpus.xml"
    other.write_text("<x/>")
    with pytest.raises(CorpusError, match="cannot tell the format"):
        list(read_articles(other))


def test_empty_text_is_allowed_and_csv_lists(tmp_path: Path) -> None:
    path = tmp_path / "c.csv"
    path.write_text('id,title,text,links,aliases\na,A,,"x|y",\nb,B,words,"[""A""]",al one|al two\n')
    arts = list(read_articles(path))
    assert arts[0].text == "" and arts[0].links == ("x", "y")
    assert arts[1].links == ("A",) and arts[1].aliases == ("al one", "al two")


def test_records_in_memory_are_counted_as_items_not_lines(tmp_path: Path) -> None:
    # A list (or the JSON array of an admin call) has no lines: positions are items.
    records = [
        {"id": "a", "title": "Alpha", "text": "x"},
        {"id": "b", "title": "Beta", "text": "y"},
        {"id": "a", "title": "Gamma", "text": "z"},
    ]
    with pytest.raises(CorpusError) as info:
        list(read_articles(records))
    assert str(info.value) == (
        "<records>, item 3, field 'id': duplicate id 'a' (first seen on item 1)"
    )
    expected = r"item 3, field 'id': duplicate id 'a' \(first seen on item 1\)"
    with pytest.raises(CorpusError, match=expected):
        build_index(records, tmp_path / "idx", vectors=False)
