"""The index folder on disk: atomic replacement, JSON writes, checked arrays."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from retriever import IndexFormatError
from retriever.store import MANIFEST, atomic_folder, open_array, save_array, write_json


def test_failed_write_leaves_target_untouched(tmp_path: Path) -> None:
    target = tmp_path / "idx"
    with atomic_folder(target) as tmp:
        (tmp / MANIFEST).write_text("{}")
        (tmp / "a.txt").write_text("old")
    with pytest.raises(RuntimeError), atomic_folder(target) as tmp:
        (tmp / "a.txt").write_text("new")
        raise RuntimeError("crash half way")
    assert (target / "a.txt").read_text() == "old"
    assert not list(tmp_path.glob(".idx.building-*"))


def test_successful_write_replaces_whole_folder(tmp_path: Path) -> None:
    target = tmp_path / "idx"
    for content in ("one", "two"):
        with atomic_folder(target) as tmp:
            (tmp / MANIFEST).write_text("{}")
            (tmp / content).write_text(content)
    assert sorted(p.name for p in target.iterdir()) == [MANIFEST, "two"]
    assert [p.name for p in tmp_path.iterdir()] == ["idx"]


def test_write_json_leaves_no_temp_file(tmp_path: Path) -> None:
    write_json(tmp_path / "x.json", {"é": [1, 2]})
    assert (tmp_path / "x.json").read_text(encoding="utf-8") == '{"é":[1,2]}'
    assert [p.name for p in tmp_path.iterdir()] == ["x.json"]


def test_open_array_checks_dtype_and_length(tmp_path: Path) -> None:
    save_array(tmp_path, "v", np.arange(4, dtype=np.int32))
    assert open_array(tmp_path, "v", "int32", 4).tolist() == [0, 1, 2, 3]
    with pytest.raises(IndexFormatError, match="expected float64"):
        open_array(tmp_path, "v", "float64", 4)
    with pytest.raises(IndexFormatError, match="length 5"):
        open_array(tmp_path, "v", "int32", 5)
    with pytest.raises(IndexFormatError, match="missing"):
        open_array(tmp_path, "w", "int32")
    np.save(tmp_path / "obj.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(IndexFormatError, match="corrupt"):
        open_array(tmp_path, "obj", "int32")
