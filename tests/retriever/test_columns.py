"""String columns and the vocabulary lookup of an index folder."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from retriever.columns import (
    MAX_KEY_BYTES,
    JsonListColumn,
    StringColumn,
    Vocab,
    write_strings,
    write_vocab,
)
from retriever.errors import IndexFormatError

VALUES = ["harbor", "", "Ünïcödé title", "x" * 100, "zeta (town)", "alpha"]


def test_strings_round_trip(tmp_path: Path) -> None:
    assert write_strings(tmp_path, "col", VALUES, sort_index=True) == len(VALUES)
    col = StringColumn(tmp_path, "col", len(VALUES))
    assert len(col) == len(VALUES)
    assert list(col) == VALUES and col.tolist() == VALUES
    assert [col[i] for i in range(len(VALUES))] == VALUES
    assert col[-1] == "alpha" and col[1:3] == VALUES[1:3]
    assert col.take(np.array([4, 0, 4])) == [VALUES[4], VALUES[0], VALUES[4]]
    assert col.take(np.array([], dtype=np.int64)) == []
    with pytest.raises(IndexError):
        col.take(np.array([len(VALUES)]))
    with pytest.raises(IndexError):
        col[len(VALUES)]


def test_find_uses_the_sorted_order(tmp_path: Path) -> None:
    write_strings(tmp_path, "col", VALUES, sort_index=True)
    col = StringColumn(tmp_path, "col", len(VALUES))
    for row, value in enumerate(VALUES):
        assert col.find(value) == row
    assert col.find("missing") is None and "missing" not in col and "alpha" in col
    # Without the order file the same answers come from a scan.
    write_strings(tmp_path, "plain", VALUES)
    plain = StringColumn(tmp_path, "plain", len(VALUES))
    assert [plain.find(v) for v in VALUES] == list(range(len(VALUES)))


def test_empty_column(tmp_path: Path) -> None:
    write_strings(tmp_path, "col", [], sort_index=True)
    col = StringColumn(tmp_path, "col", 0)
    assert len(col) == 0 and list(col) == [] and col.find("a") is None


def test_damaged_blob_is_a_clear_error(tmp_path: Path) -> None:
    write_strings(tmp_path, "col", VALUES)
    with open(tmp_path / "col.bin", "ab") as fh:
        fh.write(b"extra")
    with pytest.raises(IndexFormatError, match=r"col\.bin.*rebuild"):
        StringColumn(tmp_path, "col", len(VALUES))
    with pytest.raises(IndexFormatError, match="col_offsets"):
        StringColumn(tmp_path, "col", len(VALUES) + 1)


def test_list_column(tmp_path: Path) -> None:
    lists = [["a", "b"], [], ["ü"]]
    write_strings(tmp_path, "al", (JsonListColumn.encode(v) for v in lists))
    col = JsonListColumn(StringColumn(tmp_path, "al", 3))
    assert list(col) == lists and col[0] == ["a", "b"] and col[1:] == lists[1:]


def test_vocab_lookup_short_long_and_unknown(tmp_path: Path) -> None:
    long_term = "q" * (MAX_KEY_BYTES + 5)
    terms = sorted(["bay", "harbor", "ñandu", long_term, "zz", "a" * MAX_KEY_BYTES])
    write_vocab(tmp_path, terms)
    vocab = Vocab(tmp_path, len(terms))
    assert len(vocab) == len(terms) and vocab.terms.tolist() == terms
    query = ["harbor", "nope", long_term, "ñandu", "q" * (MAX_KEY_BYTES + 1), "a" * MAX_KEY_BYTES]
    expected = [terms.index(t) if t in terms else -1 for t in query]
    assert vocab.lookup(query).tolist() == expected
    # A prefix of a stored term is not that term.
    assert vocab.get("harb") is None and vocab.get("zz") == terms.index("zz")
    assert vocab.lookup([]).shape == (0,)


def test_vocab_matches_a_dict_on_many_terms(tmp_path: Path) -> None:
    rng = np.random.default_rng(5)
    letters = list("abcdefghijklmnopqrstuvwxyzé")
    terms = sorted({"".join(rng.choice(letters, rng.integers(1, 40))) for _ in range(3000)})
    write_vocab(tmp_path, terms)
    vocab = Vocab(tmp_path, len(terms))
    reference = {t: i for i, t in enumerate(terms)}  # the obvious implementation
    probe = terms[::7] + ["".join(rng.choice(letters, 6)) for _ in range(500)]
    assert vocab.lookup(probe).tolist() == [reference.get(t, -1) for t in probe]


def test_vocab_count_mismatch(tmp_path: Path) -> None:
    write_vocab(tmp_path, ["a", "b"])
    with pytest.raises(IndexFormatError):
        Vocab(tmp_path, 3)
