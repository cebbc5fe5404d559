"""Labelled logs: reading, bad lines, served + feedback joins, and how gold answers resolve."""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from reranker import LabelledLogError, default_registry
from reranker.training import build_table, read_logs
from reranker.training.logs import LogReport, write_labelled
from retriever import Index, build_index

Writer = Callable[[Path, Iterable[Any]], Path]
GOOD = {"clue": "grey stone town", "answer": "a3", "metadata": {"difficulty": 2}}


def test_labelled_lines_keep_file_line_and_metadata(tmp_path: Path, jsonl: Writer) -> None:
    log = jsonl(
        tmp_path / "log.jsonl", [GOOD, "", {"clue": "kesvin river", "answer": "Kesvin (river)"}]
    )
    clues = read_logs([log])
    assert [(c.clue, c.answer, c.metadata, c.line) for c in clues] == [
        ("grey stone town", "a3", {"difficulty": 2}, 1),
        ("kesvin river", "Kesvin (river)", {}, 3),  # the blank line 2 is skipped but still counted
    ]
    assert all(c.file == str(log) for c in clues)


BAD_LINES = [
    ('{"clue": "x", "answer": ', "", "malformed JSON"),
    ("[1, 2]", "", "JSON object"),
    ({"answer": "a1"}, "clue", "is required"),
    ({"clue": 5, "answer": "a1"}, "clue", "must be a string, got int"),
    ({"clue": "   ", "answer": "a1"}, "clue", "must not be empty"),
    ({"clue": "x"}, "answer", "is required"),
    ({"clue": "x", "answer": None}, "answer", "must be a string"),
    ({"clue": "x", "answer": "a1", "metadata": [1]}, "metadata", "must be an object"),
    ({"kind": "gossip", "clue": "x", "answer": "a1"}, "kind", "unknown kind"),
    ({"kind": "served", "clue": "x"}, "request_id", "is required"),
    ({"kind": "served", "request_id": "r", "clue": "x", "candidates": 3}, "candidates", "list"),
    (
        {"kind": "served", "request_id": "r", "clue": "x", "candidates": [{"id": "a1"}, {}]},
        "candidates[1]",
        "string 'id'",
    ),
    ({"kind": "feedback", "request_id": "r"}, "answer", "null for none of these"),
    ({"kind": "feedback", "request_id": "r", "answer": 7}, "answer", "must be a string"),
]


@pytest.mark.parametrize(("bad", "field", "reason"), BAD_LINES)
def test_bad_line_names_file_line_and_field(
    tmp_path: Path, jsonl: Writer, bad: Any, field: str, reason: str
) -> None:
    log = jsonl(tmp_path / "log.jsonl", [GOOD, bad, GOOD])
    with pytest.raises(LabelledLogError) as err:
        read_logs([log])
    e = err.value
    assert (e.file, e.line, e.field) == (str(log), 2, field)
    assert reason in str(e)
    where = f"{log}, line 2" + (f", field '{field}'" if field else "")
    assert str(e).startswith(where + ": ")


def test_invalid_utf8_is_a_bad_line(tmp_path: Path) -> None:
    log = tmp_path / "log.jsonl"
    log.write_bytes(json.dumps(GOOD).encode() + b'\n{"clue": "caf\xe9", "answer": "a1"}\n')
    with pytest.raises(LabelledLogError, match="line 2: not valid UTF-8"):
        read_logs([log])


def test_skip_bad_counts_and_keeps_the_good_lines(tmp_path: Path, jsonl: Writer) -> None:
    lines = [GOOD] + [b for b, _, _ in BAD_LINES] + [GOOD]
    log = jsonl(tmp_path / "log.jsonl", lines)
    report = LogReport()
    clues = read_logs([log], skip_bad=True, report=report)
    assert len(clues) == 2 and [c.line for c in clues] == [1, len(lines)]
    assert report.skipped == len(BAD_LINES)
    assert report.labelled == 2
    assert report.problems[0].startswith(f"{log}, line 2")


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(LabelledLogError, match="file not found") as err:
        read_logs([tmp_path / "nope.jsonl"])
    assert err.value.file == str(tmp_path / "nope.jsonl")


def _served(rid: str, clue: str, ids: list[str]) -> dict[str, Any]:
    """A served line in the shape api/routes.py writes."""
    return {
        "kind": "served",
        "request_id": rid,
        "clue": clue,
        "candidates": [{"id": i, "rank": n + 1} for n, i in enumerate(ids)],
        "metadata": {"difficulty": 1},
    }


def test_served_and_feedback_join_by_request_id(tmp_path: Path, jsonl: Writer) -> None:
    served = jsonl(
        tmp_path / "served.jsonl",
        [
            _served("r1", "grey stone town", ["a3", "a2"]),
            _served("r2", "kesvin small", ["a4"]),
            _served("r3", "never answered", ["a1"]),
            {"kind": "feedback", "request_id": "r1", "answer": "a2"},
        ],
    )
    feedback = jsonl(
        tmp_path / "feedback.jsonl",
        [
            {"kind": "feedback", "request_id": "r1", "answer": "a3"},  # the last word wins
            {"kind": "feedback", "request_id": "r2", "answer": None},  # none of these
            {"kind": "feedback", "request_id": "r9", "answer": "a1"},  # served line not kept
        ],
    )
    report = LogReport()
    clues = read_logs([served, feedback], report=report)
    by_clue = {c.clue: c for c in clues}
    assert set(by_clue) == {"grey stone town", "kesvin small"}
    assert by_clue["grey stone town"].answer == "a3"
    assert by_clue["grey stone town"].served == ("a3", "a2")
    assert by_clue["grey stone town"].metadata == {"difficulty": 1}
    assert (by_clue["grey stone town"].file, by_clue["grey stone town"].line) == (str(served), 1)
    assert by_clue["kesvin small"].answer is None
    assert report.served == 3 and report.feedback == 4
    assert report.served_without_feedback == 1 and report.feedback_without_served == 1


def test_none_of_these_labels_every_candidate_wrong(
    tiny_index: Index, tmp_path: Path, jsonl: Writer
) -> None:
    log = jsonl(
        tmp_path / "served.jsonl",
        [
            _served("r1", "grey stone town", []),
            _served("r2", "stone river", []),
            {"kind": "feedback", "request_id": "r1", "answer": "a3"},
            {"kind": "feedback", "request_id": "r2", "answer": None},
        ],
    )
    clues = read_logs([log])
    table = build_table(tiny_index, clues, default_registry(), ["bm25_score"], k=5)
    full = table.fraction == 1.0
    first = full & (table.clue_id == 0)
    second = full & (table.clue_id == 1)
    assert second.sum() == len(tiny_index.search("stone river", k=5)) > 0
    assert table.y[second].sum() == 0
    assert table.row[first & (table.y == 1)].tolist() == [tiny_index.row_of("a3")]
    assert table.unresolved == []


def test_write_labelled_round_trip(tmp_path: Path, jsonl: Writer) -> None:
    src = jsonl(tmp_path / "in.jsonl", [GOOD, {"clue": "kesvin", "answer": "a4"}])
    out = tmp_path / "out.jsonl"
    write_labelled(out, read_logs([src]))
    again = read_logs([out])
    assert [(c.clue, c.answer, c.metadata) for c in again] == [
        ("grey stone town", "a3", {"difficulty": 2}),
        ("kesvin", "a4", {}),
    ]
    assert not list(tmp_path.glob(".*tmp"))


# -- gold answers: id, exact title, normalized title, then alias -----------------------------
RESOLVE_CORPUS: list[dict[str, Any]] = [
    {"id": "Quell", "title": "Brand", "text": "common"},
    {"id": "y1", "title": "Quell", "text": "common"},
    {"id": "m1", "title": "Morlune", "text": "common"},
    {"id": "m2", "title": "morlune", "text": "common"},
    {"id": "g1", "title": "Grey Pellomir", "text": "common"},
    {"id": "g2", "title": "Other", "text": "common", "aliases": ["Grey Pellomir", "Old Ostrel"]},
    {"id": "t1", "title": "Twin One", "text": "common", "aliases": ["The Twin"]},
    {"id": "t2", "title": "Twin Two", "text": "common", "aliases": ["The Twin"]},
]
RESOLVE_CASES = [
    ("Quell", "Quell"),  # an id beats another article's exact title
    ("Brand", "Quell"),  # exact title
    ("morlune", "m2"),  # exact title beats the normalized match of "Morlune"
    ("  MORLUNE ", "m1"),  # normalized title: the first title that normalizes the same
    ("GREY  pellomir", "g1"),  # a normalized title beats an alias
    ("old ostrel", "g2"),  # alias (normalized)
]


@pytest.fixture(scope="module")
def resolve_index(tmp_path_factory: pytest.TempPathFactory) -> Index:
    """Eight articles that share the word 'common', so one clue retrieves them all."""
    return build_index(RESOLVE_CORPUS, tmp_path_factory.mktemp("resolve") / "index")


def test_gold_answers_resolve_in_order_and_the_rest_are_listed(
    resolve_index: Index, tmp_path: Path, jsonl: Writer
) -> None:
    lines = [{"clue": "common", "answer": a} for a, _ in RESOLVE_CASES]
    lines += [{"clue": "common", "answer": "The Twin"}, {"clue": "common", "answer": "Nobody"}]
    log = jsonl(tmp_path / "log.jsonl", lines)
    table = build_table(resolve_index, read_logs([log]), default_registry(), ["bm25_score"], k=20)
    assert table.n_clues == len(RESOLVE_CASES)
    for cid, (_, doc_id) in enumerate(RESOLVE_CASES):
        rows = table.row[(table.clue_id == cid) & (table.y == 1)]
        assert {resolve_index.ids[r] for r in rows.tolist()} == {doc_id}
        assert len(table.row[table.clue_id == cid]) == len(RESOLVE_CORPUS)
    # An alias two articles share names neither; an unknown name names none. Both listed.
    assert table.unresolved == [
        {"file": str(log), "line": 7, "answer": "The Twin", "clue": "common"},
        {"file": str(log), "line": 8, "answer": "Nobody", "clue": "common"},
    ]
    assert np.all(table.fraction > 0)
