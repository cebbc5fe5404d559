"""Building from a file: the worker-side reader reports and skips exactly like read_articles."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest

from retriever import CorpusError, ReadReport, build_index, read_articles
from retriever.counting import CHUNK

from .foldoc import synthetic_articles
from .test_corpus import BadCorpus, bad_corpus

__all__ = ["bad_corpus"]  # a fixture


def test_build_fails_with_the_same_error_as_the_reader(
    bad_corpus: BadCorpus, tmp_path: Path
) -> None:
    path, lineno, field, _ = bad_corpus
    with pytest.raises(CorpusError) as read_err:
        list(read_articles(path))
    with pytest.raises(CorpusError) as build_err:
        build_index(path, tmp_path / "idx")
    assert str(build_err.value) == str(read_err.value)
    assert (build_err.value.line, build_err.value.field) == (lineno, field or "")
    assert not (tmp_path / "idx").exists()


def _messy_corpus(path: Path) -> tuple[list[dict[str, object]], list[int]]:
    """Good records with bad lines and duplicates spread over several chunks."""
    records = list(synthetic_articles(3 * CHUNK, seed=7))
    lines = [json.dumps(r) for r in records]
    bad_at = {5: "{oops", CHUNK + 3: '{"id": "x"}', 2 * CHUNK + 11: "[1]"}
    # Duplicates of articles from earlier chunks (one id, one title).
    dups = {
        CHUNK + 50: json.dumps({**records[2], "title": "a fresh title"}),
        2 * CHUNK + 70: json.dumps({**records[CHUNK + 1], "id": "fresh-id"}),
    }
    out, bad_lines = [], []
    for i, text in enumerate(lines):
        for extra in (bad_at.get(i), dups.get(i)):
            if extra is not None:
                out.append(extra)
                bad_lines.append(len(out))
        out.append(text)
    path.write_text("\n".join(out) + "\n")
    return records, bad_lines


@pytest.mark.parametrize("workers", [1, 2])
def test_skip_bad_drops_exactly_the_bad_lines(tmp_path: Path, workers: int) -> None:
    path = tmp_path / "messy.jsonl"
    records, bad_lines = _messy_corpus(path)
    expected = ReadReport()
    kept = list(read_articles(path, skip_bad=True, report=expected))
    report = ReadReport()
    idx = build_index(
        path, tmp_path / "idx", skip_bad=True, report=report, workers=workers, vectors=False
    )
    assert report == expected
    assert report.skipped == len(bad_lines)
    assert all(
        re.search(rf"line {n}\b", p) for n, p in zip(bad_lines, report.problems, strict=True)
    )
    assert idx.ids.tolist() == [a.id for a in kept] == [r["id"] for r in records]
    # Same index as one built from the good records alone.
    clean = build_index(records, tmp_path / "clean", workers=1, vectors=False)
    for name in ("body_docs", "body_weight", "body_indptr", "title_docs", "doc_len"):
        assert np.array_equal(
            np.load(idx.path / f"{name}.npy"), np.load(clean.path / f"{name}.npy")
        )
    # The file's lines are stored as written and the records re-encoded; both read back alike.
    assert [idx.document_at(r) for r in range(idx.n_docs)] == [
        clean.document_at(r) for r in range(clean.n_docs)
    ]
    assert idx.document_at(CHUNK + 1).text == records[CHUNK + 1]["text"]


def test_first_bad_line_wins_across_chunks(tmp_path: Path) -> None:
    path = tmp_path / "messy.jsonl"
    _, bad_lines = _messy_corpus(path)
    with pytest.raises(CorpusError, match=rf"line {bad_lines[0]}: malformed JSON"):
        build_index(path, tmp_path / "idx", workers=2)


SHORT_ROWS = (
    "id,title,text,links\n"
    "a1,Alpha,river song,Beta|Nowhere\n"
    "a2,Beta\n"  # line 3: no text, no links
    "a3,Gamma,lake boat\n"  # line 4: no links
    "a4,Delta,marsh reed,Alpha\n"
)


@pytest.mark.parametrize("workers", [1, 2])
def test_short_csv_row_is_a_clear_error_in_both_readers(tmp_path: Path, workers: int) -> None:
    path = tmp_path / "short.csv"
    path.write_text(SHORT_ROWS)
    with pytest.raises(CorpusError) as read_err:
        list(read_articles(path))
    with pytest.raises(CorpusError) as build_err:
        build_index(path, tmp_path / "idx", workers=workers)
    msg = str(read_err.value)
    assert str(build_err.value) == msg
    assert msg.startswith(f"{path}, line 3: ")
    assert "2 cells" in msg and "'text', 'links'" in msg
    assert not (tmp_path / "idx").exists()


@pytest.mark.parametrize("workers", [1, 2])
def test_short_csv_rows_are_skipped_and_reported(tmp_path: Path, workers: int) -> None:
    path = tmp_path / "short.csv"
    path.write_text(SHORT_ROWS)
    expected = ReadReport()
    kept = [a.id for a in read_articles(path, skip_bad=True, report=expected)]
    report = ReadReport()
    idx = build_index(path, tmp_path / "idx", skip_bad=True, report=report, workers=workers)
    assert report == expected
    assert idx.ids.tolist() == kept == ["a1", "a4"]
    assert report.skipped == 2
    assert "line 3: " in report.problems[0] and "'text', 'links'" in report.problems[0]
    assert "line 4: " in report.problems[1] and "'links'" in report.problems[1]


# Lines where a fast JSON parser and Python's json could disagree: integers past 64 bits,
# NaN and infinities, a lone surrogate, a repeated key, exponents, escapes, non-ASCII text.
_JSON_EDGES = [
    b'{"id": "a", "n": 123456789012345678901234567890}',
    b'{"id": "a", "n": 18446744073709551616, "m": -9223372036854775809}',
    b'{"id": "a", "n": 9223372036854775807, "m": 18446744073709551615}',
    b'{"id": "a", "n": NaN, "m": Infinity, "k": -Infinity}',
    b'{"id": "a", "n": 1e400}',
    b'{"id": "a", "t": "\\ud800 alone"}',
    b'{"id": "a", "id": "b"}',
    b'{"id": "a", "n": 1E2, "m": -0.0, "k": 0.1, "j": 5e-324}',
    b'{"id": "a", "t": "caf\\u00e9 \\"q\\" \\n"}',
    '{"id": "a", "t": "\u00e9t\u00e9 \u03bb"}'.encode(),
]


@pytest.mark.parametrize("line", _JSON_EDGES)
def test_lines_parse_as_python_json_parses_them(line: bytes) -> None:
    # Reference: Python's standard json module, which the reader (read_articles) uses.
    from retriever.recordjson import _loads

    expected = json.loads(line.decode("utf-8"))
    got = _loads(line)
    assert repr(got) == repr(expected)
    assert [type(v) for v in got.values()] == [type(v) for v in expected.values()]


@pytest.mark.parametrize("line", [b'{"id": "a"', b'{"id": "\xff"}', b"\xef\xbb\xbf{}", b"[1,]"])
def test_bad_lines_give_python_json_errors(line: bytes) -> None:
    from retriever.recordjson import _json_loads, _loads

    with pytest.raises(ValueError) as fast:
        _loads(line)
    with pytest.raises(ValueError) as slow:
        _json_loads(line)
    assert str(fast.value) == str(slow.value)
    assert str(fast.value).startswith(("malformed JSON", "not valid UTF-8"))


@pytest.mark.parametrize(
    "line",
    [
        b'{"id": 123456789012345678901234, "title": "T", "text": "x"}',
        b'{"id": "a", "title": "T", "text": "x", "popularity": -123456789012345678901234}',
    ],
)
def test_build_reports_long_integers_as_the_reader_does(tmp_path: Path, line: bytes) -> None:
    path = tmp_path / "c.jsonl"
    path.write_bytes(line + b"\n")
    # Reference: read_articles, which parses with Python's standard json module.
    with pytest.raises(CorpusError) as read_err:
        list(read_articles(path))
    with pytest.raises(CorpusError) as build_err:
        build_index(path, tmp_path / "idx", vectors=False)
    assert str(build_err.value) == str(read_err.value)
    assert "123456789012345678901234" in str(build_err.value) or "got int" in str(build_err.value)
