"""retriever/npymap.py: .npy files mapped without numpy's header parser (and so without `ast`,
whose builder state CPython 3.11 shares between threads)."""

from __future__ import annotations

import ast
import re
import threading
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from retriever import IndexFormatError, build_index, load_index, store
from retriever.hybrid import search_hybrid
from retriever.npymap import map_npy
from tests.retriever.foldoc import foldoc_words, synthetic_articles

# Reference: numpy's own np.load(path, mmap_mode="r") on files written by np.save.
ARRAYS = {
    "int64": np.arange(10, dtype=np.int64),
    "float32 2-d": np.random.default_rng(1).random((5, 7)).astype(np.float32),
    "float16 2-d": np.arange(6, dtype=np.float16).reshape(2, 3),
    "bytes": np.array([b"ab", b"xyz"]),
    "empty": np.zeros(0, dtype=np.int32),
    "empty 2-d": np.zeros((0, 4), dtype=np.float32),
    "Fortran order": np.asfortranarray(np.arange(12.0).reshape(3, 4)),
    "bool": np.array([True, False]),
    "0-d": np.array(3.5),
    "big-endian": np.arange(4, dtype=">i4"),
    "structured (np.load fallback)": np.zeros(3, dtype=[("a", "<i4"), ("b", "<f8")]),
}


@pytest.mark.parametrize("name", list(ARRAYS))
def test_same_array_as_numpy_s_loader(name: str, tmp_path: Path) -> None:
    path = tmp_path / "a.npy"
    np.save(path, ARRAYS[name], allow_pickle=False)
    ref = np.load(path, mmap_mode="r", allow_pickle=False)
    got = map_npy(path)
    assert got.dtype == ref.dtype and got.shape == ref.shape
    assert np.array_equal(np.asarray(got), np.asarray(ref))
    assert got.flags.f_contiguous == ref.flags.f_contiguous
    assert not got.flags.writeable


def _no_ast(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Make any use of the standard library's AST builder fail, and note it."""
    used: list[str] = []

    def refuse(*args: Any, **kwargs: Any) -> Any:
        used.append(threading.current_thread().name)
        raise AssertionError("ast.parse was called")

    monkeypatch.setattr(ast, "parse", refuse)
    return used


def test_opening_an_index_with_vectors_parses_no_python(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    records = list(synthetic_articles(120, seed=3, words=foldoc_words()[:20_000]))
    vectors = {"dim": 8, "epochs": 1, "min_count": 2, "seed": 1, "threads": 1}
    build_index(records, tmp_path / "idx", vectors=vectors)
    used = _no_ast(monkeypatch)
    idx = load_index(tmp_path / "idx")
    clue = records[0]["text"][:80]
    assert idx.search(clue, 5)
    assert idx.dense is not None  # the vectors' files are mapped too
    assert search_hybrid(idx, clue, 5)
    assert used == []


def test_damaged_files_are_refused_with_the_file_named(tmp_path: Path) -> None:
    np.save(tmp_path / "cut.npy", np.arange(100, dtype=np.int64), allow_pickle=False)
    raw = (tmp_path / "cut.npy").read_bytes()
    (tmp_path / "cut.npy").write_bytes(raw[:-8])  # one value short
    with pytest.raises(ValueError, match=re.escape("cut.npy is cut off")):
        map_npy(tmp_path / "cut.npy")
    with pytest.raises(IndexFormatError, match=re.escape("cut.npy is corrupt")):
        store.open_array(tmp_path, "cut", "int64", 100)
    (tmp_path / "junk.npy").write_bytes(b"not an array at all")
    with pytest.raises(ValueError, match=re.escape("junk.npy is not a .npy file")):
        map_npy(tmp_path / "junk.npy")
    (tmp_path / "short.npy").write_bytes(raw[:30])  # header cut off
    with pytest.raises(ValueError, match=re.escape("short.npy: the .npy header is cut off")):
        map_npy(tmp_path / "short.npy")
